"""The standard codecs, through Pillow, for comparisons at equal rate.

Each baseline maps a quality knob to bytes; :func:`sweep` gives rate-distortion points
and :func:`at_rate` finds the knob whose file is closest to a given rate. Every rate is the
size of the file Pillow wrote, headers included.
"""

from __future__ import annotations

import io
from dataclasses import dataclass

import numpy as np
from PIL import Image, features

from . import metrics
from ..errors import InputError


@dataclass(frozen=True)
class Baseline:
    name: str
    label: str
    pillow_format: str
    feature: str
    knobs: tuple  # increasing quality

    def available(self) -> bool:
        return bool(features.check(self.feature))

    def options(self, knob) -> dict:
        if self.name == "jpeg":
            return {"quality": int(knob), "optimize": True, "subsampling": 2}
        if self.name == "jpeg2000":
            return {"quality_mode": "rates", "quality_layers": [float(knob)], "irreversible": True}
        if self.name == "webp":
            return {"quality": int(knob), "method": 6}
        if self.name == "avif":
            # libavif's default speed; one thread (the sheet runs one image per process).
            return {"quality": int(knob), "speed": 6, "subsampling": "4:2:0", "max_threads": 1}
        raise InputError(f"unknown baseline {self.name!r}")


BASELINES = {
    "jpeg": Baseline("jpeg", "JPEG (Pillow, optimised Huffman, 4:2:0)", "JPEG", "jpg", tuple(range(5, 100, 5))),
    # JPEG 2000's knob is a compression ratio: smaller ratio = higher quality.
    "jpeg2000": Baseline("jpeg2000", "JPEG 2000 (Pillow/OpenJPEG, 9/7)", "JPEG2000", "jpg_2000",
                         (200, 120, 80, 60, 45, 32, 24, 18, 13, 10, 7, 5, 3.5)),
    "webp": Baseline("webp", "WebP (Pillow/libwebp)", "WEBP", "webp", tuple(range(5, 100, 5))),
    "avif": Baseline("avif", "AVIF (Pillow/libavif, 4:2:0)", "AVIF", "avif", tuple(range(5, 100, 5))),
}


def get(name: str) -> Baseline:
    if name not in BASELINES:
        raise InputError(f"unknown baseline {name!r}; choose from {', '.join(BASELINES)}")
    b = BASELINES[name]
    if not b.available():
        raise InputError(f"baseline {name} is not available in this Pillow build")
    return b


def supports(b: Baseline, pixels: np.ndarray) -> bool:
    """8-bit grey and RGB for all; 16-bit only through JPEG 2000 (grey)."""
    if pixels.dtype == np.uint8:
        return pixels.ndim == 2 or pixels.shape[2] == 3
    return b.name == "jpeg2000" and pixels.ndim == 2


def encode(b: Baseline, pixels: np.ndarray, knob) -> bytes:
    if not supports(b, pixels):
        raise InputError(f"{b.name} cannot carry {pixels.dtype} pixels of shape {pixels.shape}")
    im = Image.fromarray(pixels)
    buf = io.BytesIO()
    im.save(buf, format=b.pillow_format, **b.options(knob))
    return buf.getvalue()


def decode(data: bytes, grey: bool = False) -> np.ndarray:
    """Pixels of a baseline file; ``grey`` converts codecs that always decode to colour (WebP)."""
    with Image.open(io.BytesIO(data)) as im:
        im.load()
        if grey and im.mode not in ("L", "I;16", "I;16B", "I;16L", "I"):
            im = im.convert("L")
        a = np.asarray(im)
        return a.astype(np.uint16) if a.dtype.kind in "iu" and a.dtype.itemsize > 1 else a


@dataclass(frozen=True)
class Point:
    knob: float
    bytes: int
    bpp: float
    psnr: float
    ssim: float


def point(b: Baseline, pixels: np.ndarray, knob, *, with_ssim: bool = True, ssim_ref=None) -> Point:
    """One encode and decode at ``knob``; ``ssim_ref`` (a :class:`metrics.SSIMReference`
    of ``pixels``) saves redoing the reference's half of SSIM for every point."""
    data = encode(b, pixels, knob)
    rec = decode(data, grey=pixels.ndim == 2)
    if rec.shape != pixels.shape or rec.dtype != pixels.dtype:
        raise InputError(f"{b.name} decoded {rec.shape} {rec.dtype}, expected {pixels.shape} {pixels.dtype}")
    peak = 65535 if pixels.dtype == np.uint16 else 255
    if not with_ssim:
        s = float("nan")
    else:
        s = ssim_ref.ssim(rec) if ssim_ref is not None else metrics.ssim(pixels, rec, data_range=peak)
    return Point(float(knob), len(data), 8 * len(data) / (pixels.shape[0] * pixels.shape[1]),
                 metrics.psnr(pixels, rec, data_range=peak), s)


def sweep(b: Baseline, pixels: np.ndarray, knobs=None, *, with_ssim: bool = True, ssim_ref=None) -> list[Point]:
    """Rate-distortion points over ``knobs`` (the baseline's default sweep if None), by rate."""
    pts = [point(b, pixels, k, with_ssim=with_ssim, ssim_ref=ssim_ref) for k in (knobs or b.knobs)]
    return sorted(pts, key=lambda p: p.bpp)


def at_rate(b: Baseline, pixels: np.ndarray, bpp: float) -> Point:
    """The sweep point whose rate is closest to ``bpp``, refined by bisection on the knob."""
    knobs = list(b.knobs)
    pts = [point(b, pixels, k, with_ssim=False) for k in knobs]
    i = int(np.argmin([abs(p.bpp - bpp) for p in pts]))
    best = pts[i]
    if b.name != "jpeg2000":
        lo, hi = knobs[max(i - 1, 0)], knobs[min(i + 1, len(knobs) - 1)]
        for k in range(int(lo), int(hi) + 1):
            p = point(b, pixels, k, with_ssim=False)
            if abs(p.bpp - bpp) < abs(best.bpp - bpp):
                best = p
    return point(b, pixels, best.knob)
