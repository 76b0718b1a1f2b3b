"""Structure-aware fuzzing at scale: every reader total, bounded in time and memory.

Run: python tests/benchmarks/bench_fuzz.py [--scale 1.0] [--seed 7]
At scale 1: 100,000 mutants of KLT bundles, 10,000 of conv bundles, 20,000 of basis files
and 10,000 of model files (issue 15's targets). Prints per kind: mutants, refused with our
error class, read, other exceptions (bugs; warnings count as bugs), the slowest read, reads
over 2 s, and the process's peak resident memory above its start (ru_maxrss).
"""

from __future__ import annotations

import argparse
import resource
import sys
import time
import warnings
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

import numpy as np  # noqa: E402
from skimage import data  # noqa: E402

import fuzzing  # noqa: E402
import workbench  # noqa: E402
from workbench import codecs, pipeline
from workbench.codecs import klt_basis, tiling
from workbench.formats import basisfile, bundle, modelfile  # noqa: E402


def peak_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def read_bundle(m: bytes):
    contents, decoded = pipeline.decode(m)
    for e, d in zip(contents.entries, decoded):
        if d.pixels.shape[:2] != (e.height, e.width):
            raise AssertionError("decoded pixels of the wrong size")


def section(what, read, sources, magic, version, count, seed):
    report, slow = fuzzing.Report(), [0]

    def on_each(m, dt):
        if dt > 2.0:
            slow[0] += 1

    start = peak_mib()
    per = max(1, count // len(sources))
    for i, b in enumerate(sources):
        fuzzing.run(read, b, magic, version, seed=seed + i, count=per, report=report, on_each=on_each)
    print(f"{report.line(what)}, {slow[0]} over 2 s, peak memory +{peak_mib() - start:.0f} MiB", flush=True)
    for kind, msg, _ in report.bugs[:5]:
        print(f"    {kind}: {msg}")
    return report


def main(argv=None):
    ap = argparse.ArgumentParser()
    ap.add_argument("--scale", type=float, default=1.0)
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--only", choices=["klt", "basis", "conv", "model"])
    a = ap.parse_args(argv)
    warnings.simplefilter("error")  # a warning on hostile input is a defect too
    t0 = time.perf_counter()
    rgba = np.dstack([data.astronaut()[:40, :56], np.full((40, 56), 200, np.uint8)])
    klt_sources = [workbench.compress({"a.png": rgba, "c.png": data.camera()[:24, :32]}, step=4),
                   workbench.compress({"a.png": data.chelsea()[:48, :40]}, step=8, basis_scope="folder"),
                   workbench.compress({"g": data.camera()[:40, :40].astype(np.uint16) * 257}, step=3, chroma="444",
                                      block=4)]
    basis = klt_basis.fit_basis([tiling.to_patches(data.camera().astype(float), 8)], 8)
    jobs = {
        "klt": ("KLT bundles", read_bundle, klt_sources, bundle.MAGIC, bundle.VERSION, 100_000),
        "basis": ("basis files", basisfile.parse_basis_file, [basisfile.basis_file_bytes(basis, sources=["camera"])],
                  basisfile.MAGIC, basisfile.VERSION, 20_000),
    }
    try:
        conv = codecs.get("conv")
        model, _ = conv.default_model()
        jobs["conv"] = ("conv bundles", read_bundle, [workbench.compress({"a.png": data.astronaut()[:32, :48]},
                                                                         method="conv", step=6)],
                        bundle.MAGIC, bundle.VERSION, 10_000)
        jobs["model"] = ("model files", conv.shared_from_bytes, [model.data.raw], modelfile.MAGIC, modelfile.VERSION,
                         10_000)
    except ImportError:
        print("torch missing: conv bundles and model files left out")
    bugs = 0
    for key, (what, read, sources, magic, version, count) in jobs.items():
        if a.only and key != a.only:
            continue
        bugs += len(section(what, read, sources, magic, version, int(count * a.scale), a.seed).bugs)
    print(f"total {time.perf_counter() - t0:.0f} s, {bugs} bugs")
    return 1 if bugs else 0


if __name__ == "__main__":
    sys.exit(main())
