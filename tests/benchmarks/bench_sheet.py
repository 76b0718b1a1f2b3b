"""Quality-sheet benchmark: a 20-image, 1-megapixel folder with all four baselines.

Run: python tests/benchmarks/bench_sheet.py
Prints the wall time of the whole sheet (bundle, decode, RD curves, PDF/CSV/JSON).
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "sample_images"))

import make_samples  # noqa: E402

from workbench import Settings  # noqa: E402
from workbench.formats.imagefiles import SourceImage  # noqa: E402
from workbench.jobs import run  # noqa: E402
from workbench.sheet import sheet_job  # noqa: E402


def main():
    # as the command line and the app do for themselves (workbench.runtime)
    from workbench.runtime import tune_allocator

    tune_allocator()
    rng = np.random.default_rng(5)
    images = []
    for i in range(20):
        px = make_samples.aerial(rng, 864, 1152) if i % 2 else make_samples.fabric(rng, 864, 1152)
        images.append(SourceImage(f"frame_{i:02d}.png", px))
    with tempfile.TemporaryDirectory() as out:
        t = time.perf_counter()
        sheet = run(sheet_job(images, Settings(), out))
        dt = time.perf_counter() - t
    mp = sum(i.width * i.height for i in images) / 1e6
    print(f"sheet for {len(images)} images ({mp:.1f} Mpixel) with jpeg, jpeg2000, webp, avif: {dt:.1f} s "
          f"(target 120 s)")
    print("folder BD-rate (PSNR):", {k: round(v["psnr"], 1) for k, v in sheet["folder"]["bd_rate"].items()})


if __name__ == "__main__":
    main()
