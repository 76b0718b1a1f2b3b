"""The synthetic demo images (deterministic, seed fixed): also what the app opens when it has
no folder yet and no samples beside it.

Scenario (fictional): the Harrowgate Weaving Cooperative photographs every bolt of cloth on
its looms, a survey drone of the (equally fictional) Lowmarsh land trust maps its fields,
and a bench microscope records 16-bit fluorescence-like frames of cultured cells.
Every pixel here is computed; nothing is a photograph.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from scipy import ndimage

from .formats.imagefiles import encode_png, write_atomic

SEED = 20261201


def smooth_noise(rng, shape, sigma):
    return ndimage.gaussian_filter(rng.standard_normal(shape), sigma)


def fabric(rng, h=384, w=512, defect=False):
    y, x = np.mgrid[0:h, 0:w].astype(float)
    period = rng.uniform(5, 8)
    angle = rng.uniform(-0.05, 0.05)
    u = x * np.cos(angle) + y * np.sin(angle)
    v = -x * np.sin(angle) + y * np.cos(angle)
    warp = 0.5 + 0.5 * np.sin(2 * np.pi * u / period)
    weft = 0.5 + 0.5 * np.sin(2 * np.pi * v / (period * 1.1))
    over = (np.floor(u / period) + np.floor(v / period)) % 2
    weave = np.where(over > 0, warp, weft) * 0.6 + 0.4
    base = np.array(rng.choice([[150, 40, 50], [40, 80, 140], [170, 150, 90], [60, 110, 70]]), float)
    lum = weave * (1 + 0.08 * smooth_noise(rng, (h, w), 20)) * (0.85 + 0.15 * (x / w))
    img = lum[..., None] * base[None, None, :] + 3 * rng.standard_normal((h, w, 3))
    if defect:
        cy, cx = rng.integers(80, h - 80), rng.integers(80, w - 80)
        r = np.hypot(y - cy, (x - cx) * 0.3)
        img[r < 18] *= 0.45
        img[:, int(cx) - 2 : int(cx) + 1] += 40
    return np.clip(img, 0, 255).astype(np.uint8)


def aerial(rng, h=480, w=640):
    fields = ndimage.zoom(rng.integers(0, 5, (6, 8)), (h / 6, w / 8), order=0)[:h, :w]
    palette = np.array([[95, 125, 60], [150, 140, 80], [120, 100, 70], [70, 100, 55], [170, 160, 110]], float)
    img = palette[fields]
    y, x = np.mgrid[0:h, 0:w].astype(float)
    rows = 0.5 + 0.5 * np.sin(2 * np.pi * (x * 0.7 + y * 0.3) / 9)
    img *= (0.9 + 0.1 * rows)[..., None] * (1 + 0.1 * smooth_noise(rng, (h, w), 6))[..., None]
    road = np.abs((y - h * rng.uniform(0.3, 0.7)) - 0.25 * (x - w / 2)) < 5
    img[road] = [185, 180, 170]
    for _ in range(40):
        cy, cx, rad = rng.integers(0, h), rng.integers(0, w), rng.uniform(4, 11)
        tree = np.hypot(y - cy, x - cx) < rad
        img[tree] = img[tree] * 0.35 + np.array([30, 60, 25])
    img += 2.5 * rng.standard_normal(img.shape)
    return np.clip(img, 0, 255).astype(np.uint8)


def fluorescence(rng, h=512, w=512):
    img = np.zeros((h, w))
    y, x = np.mgrid[0:h, 0:w].astype(float)
    for _ in range(45):
        cy, cx = rng.uniform(0, h), rng.uniform(0, w)
        a, b, th = rng.uniform(8, 22), rng.uniform(6, 16), rng.uniform(0, np.pi)
        dy, dx = y - cy, x - cx
        r2 = ((dx * np.cos(th) + dy * np.sin(th)) / a) ** 2 + ((-dx * np.sin(th) + dy * np.cos(th)) / b) ** 2
        img += rng.uniform(0.3, 1.0) * np.exp(-r2 * 1.5) * (1 + 0.3 * np.exp(-r2 * 8))
    img = 1500 + 38000 * img / img.max() + 600 * smooth_noise(rng, (h, w), 30)
    img = rng.poisson(np.clip(img, 0, None) / 4.0) * 4.0
    return np.clip(img, 0, 65535).astype(np.uint16)


def samples() -> dict[str, np.ndarray]:
    """The nine demo images by file name."""
    rng = np.random.default_rng(SEED)
    items = {}
    for i in range(4):
        items[f"loom_frame_{i + 1:02d}.png"] = fabric(rng, defect=(i == 2))
    for i in range(3):
        items[f"drone_tile_{i + 1:02d}.png"] = aerial(rng)
    for i in range(2):
        items[f"cells_16bit_{i + 1:02d}.png"] = fluorescence(rng)
    return items


def write_samples(folder) -> Path:
    """Write the demo images into ``folder`` (made if needed); returns the folder."""
    folder = Path(folder)
    for name, px in samples().items():
        write_atomic(folder / name, encode_png(px))
    return folder
