"""Archive batches: throughput with 1 and 2 workers, a Dask LocalCluster against the pool,
the manifest's share of the time, the driver's memory, and resume after kill -9.

Run: python tests/benchmarks/bench_archive.py [--count 2000] [--kills 20]
Images: synthetic 512x512 frames from workbench.demo's generators (demo data).
"""

from __future__ import annotations

import argparse
import os
import random
import resource
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402

from workbench import archive, jobs  # noqa: E402
from workbench.demo import aerial, fabric  # noqa: E402
from workbench.formats.imagefiles import encode_png, write_atomic  # noqa: E402
from workbench.settings import Settings  # noqa: E402


def make_tree(root: Path, count: int) -> None:
    rng = np.random.default_rng(10)
    bases = [fabric(rng, 512, 512), aerial(rng, 512, 512), fabric(rng, 512, 512, defect=True), aerial(rng, 512, 512)]
    for i in range(count):
        # shifted crops of a few generated frames: distinct images without minutes of generation
        b = bases[i % len(bases)]
        img = np.roll(b, (7 * i) % 512, axis=(i % 2))
        write_atomic(root / f"d{i // 250:02d}" / f"f{i:05d}.png", encode_png(img))


def timed_run(src, dst, recipe, **kw):
    t = time.perf_counter()
    summary = jobs.run(archive.batch_job(src, dst, recipe, **kw))
    return time.perf_counter() - t, summary


def manifest_cost(n: int, tmp: Path) -> float:
    """Seconds to commit ``n`` rows one by one (WAL, synchronous=FULL), as the driver does."""
    db = archive.open_manifest(tmp / "m")
    t = time.perf_counter()
    for i in range(n):
        archive._put(db, {"path": f"x{i}", "status": "done", "bytes": 1})
    db.close()
    return time.perf_counter() - t


def main(argv=None):
    ap = argparse.ArgumentParser()
    ap.add_argument("--count", type=int, default=2000)
    ap.add_argument("--kills", type=int, default=20)
    a = ap.parse_args(argv)
    recipe = archive.make_recipe(Settings(step=8))
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        src = tmp / "src"
        t = time.perf_counter()
        make_tree(src, a.count)
        print(f"{a.count} images of 512x512 made in {time.perf_counter() - t:.0f} s", flush=True)
        rss0 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        t1, s1 = timed_run(src, tmp / "one", recipe, workers=1)
        t2, s2 = timed_run(src, tmp / "two", recipe, workers=2)
        rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
        print(f"1 worker {t1:.1f} s ({a.count / t1:.1f} images/s), 2 workers {t2:.1f} s ({a.count / t2:.1f} images/s): "
              f"{t1 / t2:.2f}x (target >= 1.7x); done {s1['done']}/{s2['done']}", flush=True)
        print(f"driver peak RSS {rss0 / 1024:.0f} MiB before, {rss / 1024:.0f} MiB after both runs", flush=True)
        m = manifest_cost(a.count, tmp)
        print(f"manifest: {a.count} committed rows {m:.2f} s = {100 * m / t2:.1f} % of the 2-worker run "
              "(target < 5 %)", flush=True)
        td, sd = timed_run(src, tmp / "dask", recipe, workers=2, scheduler="local")
        print(f"Dask LocalCluster, 2 workers: {td:.1f} s = {100 * (td / t2 - 1):+.1f} % against the pool "
              "(target within 15 %)", flush=True)
        same = all((tmp / "two" / r["bundle"]).read_bytes() == (tmp / "dask" / r["bundle"]).read_bytes()
                   for r in archive.rows(tmp / "two")[:200])
        print(f"pool and Dask bundles byte-identical (first 200): {same}", flush=True)
        # resume after kill -9 at random moments
        rng = random.Random(3)
        small = src / "d00"
        lost = twice = corrupt = 0
        for trial in range(a.kills):
            dst = tmp / f"kill{trial}"
            cmd = [sys.executable, "-m", "workbench", "batch", str(small), "-o", str(dst), "--workers", "2"]
            p = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, start_new_session=True)
            time.sleep(rng.uniform(1.0, 8.0))
            os.killpg(p.pid, signal.SIGKILL)
            p.wait()
            subprocess.run(cmd, capture_output=True)
            rows = archive.rows(dst)
            paths = [r["path"] for r in rows]
            lost += len(archive.sources(small)) - len(set(paths))
            twice += len(paths) - len(set(paths))
            corrupt += sum(archive.file_sha256(dst / r["bundle"]) != r["bundle_sha256"] for r in rows)
        print(f"kill -9 and resume, {a.kills} trials: {lost} items lost, {twice} done twice, {corrupt} corrupt bundles",
              flush=True)


if __name__ == "__main__":
    main()
