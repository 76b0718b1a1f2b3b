"""Generate the synthetic demo images in this folder (deterministic, seed fixed).

Run: python sample_images/make_samples.py   (the generators live in ``workbench.demo``)
"""

from __future__ import annotations

import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from workbench.demo import aerial, fabric, fluorescence, samples, smooth_noise, write_samples  # noqa: E402,F401

OUT = Path(__file__).resolve().parent


def main() -> None:
    write_samples(OUT)
    total = sum((OUT / n).stat().st_size for n in samples())
    print(f"wrote {len(samples())} synthetic images to {OUT} ({total / 1e6:.2f} MB)")


if __name__ == "__main__":
    main()
