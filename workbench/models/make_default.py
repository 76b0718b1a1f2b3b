"""Train the shipped conv model: ``python -m workbench.models.make_default [--minutes M]``.

Training data: scikit-image's bundled images except the four colour photographs the
benchmarks test on (astronaut, coffee, chelsea, rocket), plus synthetic images made by
``sample_images/make_samples.py`` with a seed of their own. Writes
``workbench/models/default.wmodel``.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
HELD_OUT = {"astronaut", "coffee", "chelsea", "rocket", "cat"}
OPEN_IMAGES = ["camera", "hubble_deep_field", "immunohistochemistry", "retina", "brick", "grass", "gravel",
               "colorwheel", "moon", "page", "text", "coins", "clock", "horse", "logo"]


def training_images():
    from skimage import data

    from workbench.formats.imagefiles import SourceImage

    out = []
    for name in OPEN_IMAGES:
        try:
            a = getattr(data, name)()
        except Exception:  # a data set that needs a download is simply left out
            continue
        if a.dtype == bool:
            a = a.astype(np.uint8) * 255
        if a.ndim == 3 and a.shape[2] == 4:
            a = a[..., :3]
        out.append(SourceImage(name, a.astype(np.uint8)))
    sys.path.insert(0, str(ROOT / "sample_images"))
    import make_samples

    rng = np.random.default_rng(424242)
    for i in range(6):
        out.append(SourceImage(f"loom{i}", make_samples.fabric(rng, defect=i == 3)))
        out.append(SourceImage(f"drone{i}", make_samples.aerial(rng)))
    return out


def main(argv=None):
    from workbench.jobs import run
    from workbench.training import TrainConfig, train_job

    ap = argparse.ArgumentParser()
    ap.add_argument("--minutes", type=float, default=15.0)
    ap.add_argument("--distortion-weight", dest="lam", type=float, default=0.08)
    ap.add_argument("-o", "--output", default=str(HERE / "default.wmodel"))
    a = ap.parse_args(argv)
    images = training_images()
    cfg = TrainConfig(minutes=a.minutes, lam=a.lam, seed=2026, start_from=None)
    last = [0.0]

    def show(p):
        if p.done - last[0] >= 30 or p.fraction >= 1:
            last[0] = p.done
            print(f"{p.done / 60:5.1f} min  {p.text}", flush=True)

    r = run(train_job(images, a.output, cfg), show)
    print(f"wrote {a.output}: {r['steps']} steps, last validation {r['history'][-1]}")


if __name__ == "__main__":
    main()
