"""kill -9 trials: outputs are old or new and complete, never mixed; nothing of ours outlives
its parent by 5 s; the next successful run leaves no temporary file.

Run: python tests/benchmarks/bench_kill.py [--trials 20] [--only encode|decode|sheet|train]
Each trial starts the CLI in its own process group, kills the leader with SIGKILL at a random
moment within the command's measured duration, then checks the output, the group and a rerun.
"""

from __future__ import annotations

import argparse
import hashlib
import os
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from PIL import Image
from skimage import data

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

from test_sheet import _group_members  # noqa: E402

from workbench.formats import bundle  # noqa: E402
from workbench.errors import WorkbenchError  # noqa: E402


def cli(*args):
    return [sys.executable, "-m", "workbench", *map(str, args)]


def snapshot(path: Path) -> dict:
    """File name -> SHA-256 of everything under ``path`` (temporaries included)."""
    if path.is_file():
        return {path.name: hashlib.sha256(path.read_bytes()).hexdigest()}
    if not path.exists():
        return {}
    return {str(p.relative_to(path)): hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(path.rglob("*"))
            if p.is_file()}


def complete_bundle(p: Path) -> bool:
    try:
        bundle.parse(p.read_bytes())
        return True
    except (WorkbenchError, OSError):
        return False


def consistent(out: Path, files: dict) -> bool:
    """Every bundle whole, and a sheet's JSON naming the bundle beside it (SHA-256)."""
    import json

    if not all(complete_bundle(out / k) for k in files if k.endswith(".wbundle")):
        return False
    for k in files:
        if k.endswith("sheet.json"):
            recorded = json.loads((out / k).read_text())["bundle"]["sha256"]
            if files[k.replace("sheet.json", "bundle.wbundle")] != recorded:
                return False
    return True


def main(argv=None):
    ap = argparse.ArgumentParser()
    ap.add_argument("--trials", type=int, default=20)
    ap.add_argument("--only", choices=["encode", "decode", "sheet", "train"])
    a = ap.parse_args(argv)
    work = Path(tempfile.mkdtemp(prefix="killtrials-"))
    src = work / "src"
    src.mkdir()
    for i, name in enumerate(["astronaut", "coffee", "chelsea", "rocket"]):
        Image.fromarray(getattr(data, name)()).save(src / f"{i}-{name}.png")
    ref = work / "ref.wbundle"
    subprocess.run(cli("encode", src, "-o", ref, "--step", "6"), check=True, capture_output=True)
    commands = {
        "encode": lambda out: cli("encode", src, "-o", out / "b.wbundle", "--step", "4"),
        "decode": lambda out: cli("decode", ref, "-o", out / "dec", "--force"),
        "sheet": lambda out: cli("sheet", src, "-o", out / "sheet", "--baselines", "jpeg,webp"),
        "train": lambda out: cli("train", src, "-o", out / "m.wmodel", "--steps", "60", "--minutes", "5",
                                 "--start-from", "none", "--latent", "16", "--hidden", "16"),
    }
    rng = random.Random(15)
    failures = 0
    for kind, make in commands.items():
        if a.only and kind != a.only:
            continue
        out = work / kind
        out.mkdir()
        t = time.perf_counter()
        subprocess.run(make(out), check=True, capture_output=True)  # the "old" outputs, and the duration
        duration = time.perf_counter() - t
        old = snapshot(out)
        stats = {"old": 0, "new": 0, "mixed": 0, "orphans": 0, "leftover temporaries": 0}
        for trial in range(a.trials):
            proc = subprocess.Popen(make(out), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                                    start_new_session=True)
            time.sleep(rng.uniform(0.05, duration))
            proc.send_signal(signal.SIGKILL)
            proc.wait()
            deadline = time.monotonic() + 5.0
            while _group_members(proc.pid) and time.monotonic() < deadline:
                time.sleep(0.1)
            if _group_members(proc.pid):
                stats["orphans"] += 1
                os.killpg(proc.pid, signal.SIGKILL)
            now = {k: v for k, v in snapshot(out).items() if not k.split("/")[-1].endswith(".part")}
            if now == old:
                stats["old"] += 1
            elif set(now) == set(old) and consistent(out, now):
                stats["new"] += 1
            else:
                stats["mixed"] += 1
            subprocess.run(make(out), check=True, capture_output=True)  # the next successful run
            stats["leftover temporaries"] += sum(1 for p in out.rglob("*.part"))
            old = snapshot(out)
        failures += stats["mixed"] + stats["orphans"]
        print(f"{kind:6s} {a.trials} trials over {duration:.1f} s: " + ", ".join(f"{k} {v}" for k, v in stats.items()),
              flush=True)
    shutil.rmtree(work, ignore_errors=True)
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
