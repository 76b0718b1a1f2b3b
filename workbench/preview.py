"""Fast what-ifs on one image for a slider: fit once, then any step or count is quantised and
reconstructed exactly as the decoder would, with the read-outs of a real one-image bundle."""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np

from . import codecs
from .quality import metrics
from .errors import InputError
from .formats.imagefiles import SourceImage
from .pipeline import ImageResult, _overhead_bytes, image_planes, planes_to_pixels
from .settings import Settings


@dataclass
class Numbers:
    """Read-outs of one image at one setting: those of its one-image bundle."""

    bytes: int
    bpp: float
    ratio: float
    psnr: float
    ssim: float
    kept: int
    step: float

    @classmethod
    def of(cls, r: ImageResult) -> "Numbers":
        """The read-outs of an encoded image."""
        return cls(int(round(r.bytes)), r.bpp, r.ratio, r.psnr, r.ssim, r.kept, r.step)


@dataclass
class Sketch:
    """A reduced view of a reconstruction and the original under it: ``pixels[i, j]``
    covers image pixels ``(y0 + f*i, x0 + f*j)`` to ``f`` further in each direction."""

    pixels: np.ndarray
    original: np.ndarray
    y0: int
    x0: int
    factor: int


def same_transform(a: Settings, b: Settings) -> bool:
    """Whether one fit of the transform serves both settings (only the step, count or
    target differ)."""
    return (a.method, a.block, a.chroma, a.basis_scope) == (b.method, b.block, b.chroma, b.basis_scope)


class ImagePreview:
    """Fast what-ifs on one image: the transform is fitted once, then any step or
    component count is quantised and reconstructed exactly as the decoder would.

    ``sketch`` is the instant view for a dragging slider, ``reconstruct`` the exact image,
    ``evaluate`` the exact image with its read-outs (entropy-coded, so the size is that of a
    real one-image bundle).
    """

    def __init__(self, img: SourceImage, settings: Settings, *, shared=None, shared_ref: str | None = None):
        self.img = img
        self.settings = settings
        self.codec = codecs.get(settings.method)
        self.shared_ref = shared_ref
        self.analysis = self.codec.analyse(image_planes(img, settings.chroma), settings, shared)
        self._ssim_ref = None  # made on first use; one numbers() call at a time

    def compatible(self, settings: Settings) -> bool:
        """Whether ``settings`` can reuse this fit (only the step, count or target differ)."""
        return same_transform(self.settings, settings)

    @property
    def channels(self) -> int | None:
        """The most components this method offers here (the conv model's latent
        channels), or None where the block size sets it."""
        return self.codec.count_range(self.analysis)

    def energy_kept(self):
        return self.codec.energy_kept(self.analysis)

    def reconstruct(self, settings: Settings):
        """``(coded, pixels)`` at ``settings.step`` with ``settings``' component count."""
        if not self.compatible(settings):
            raise InputError("settings changed the transform; make a new preview")
        coded = self.codec.quantise(self.analysis, step=settings.step, count=settings.count)
        px = planes_to_pixels(coded.planes, self.img.pixels.shape[:2], settings.chroma, self.img.bits)
        return coded, px

    def sketch(self, settings: Settings, factor: int, region=None) -> "Sketch | None":
        """A fast approximate view of the reconstruction at ``settings`` for a dragging
        slider: ``region`` (y0, y1, x0, x1 in image pixels, default all) at 1/``factor``
        scale; None when the method has no such view (then use :meth:`reconstruct`)."""
        if not self.settings.traits.has_sketch:
            return None
        if not self.compatible(settings):
            raise InputError("settings changed the transform; make a new preview")
        if factor not in self.codec.SKETCH_FACTORS:
            raise InputError(f"sketch factor must be one of {self.codec.SKETCH_FACTORS}, got {factor!r}")
        h, w = self.img.height, self.img.width
        y0, y1, x0, x1 = region or (0, h, 0, w)
        y0, y1, x0, x1 = max(0, y0), min(h, y1), max(0, x0), min(w, x1)
        if y1 <= y0 or x1 <= x0:
            raise InputError(f"sketch region {region!r} lies outside the {w}x{h} image")
        al = self.codec.sketch_alignment(settings)
        box = (y0 // al * al, -(-y1 // al) * al, x0 // al * al, -(-x1 // al) * al)
        planes = self.codec.sketch(self.analysis, float(np.float32(settings.step)), settings.kept, factor, box)
        px = planes_to_pixels(planes, planes[0].shape, "444", self.img.bits)
        valid = (-(-(min(box[1], h) - box[0]) // factor), -(-(min(box[3], w) - box[2]) // factor))
        px = px[: valid[0], : valid[1]]
        return Sketch(px, self.original_small(factor)[box[0] // factor:, box[2] // factor:][: valid[0], : valid[1]],
                      box[0], box[2], factor)

    def original_small(self, factor: int) -> np.ndarray:
        """The original averaged over ``factor`` x ``factor`` blocks (edges replicated),
        as the sketches see it; kept per factor."""
        cache = self.__dict__.setdefault("_small", {})
        if factor not in cache:
            px = self.img.pixels
            h, w = px.shape[:2]
            pad = ((0, -h % factor), (0, -w % factor)) + ((0, 0),) * (px.ndim - 2)
            p = np.pad(px, pad, mode="edge") if pad[0][1] or pad[1][1] else px
            size = (p.shape[1] // factor, p.shape[0] // factor)
            cache[factor] = px if factor == 1 else cv2.resize(p, size, interpolation=cv2.INTER_AREA)
        return cache[factor]

    def evaluate(self, settings: Settings, coder=None):
        """``(coded, pixels, Numbers)`` at ``settings``: :meth:`reconstruct` and the
        read-outs. The entropy coder runs beside the synthesis and SSIM: in ``coder`` (a
        :class:`workbench.gui.coderproc.CoderProcess`) when given and the codec allows, else in
        a thread (where it competes for the GIL)."""
        from concurrent.futures import ThreadPoolExecutor

        if not self.compatible(settings):
            raise InputError("settings changed the transform; make a new preview")
        coded = self.codec.quantise(self.analysis, step=settings.step, count=settings.count)
        with ThreadPoolExecutor(max_workers=1) as threads:
            task = None if coder is None else self.codec.size_task(coded)
            if task is not None:
                size = coder.submit(*task)
            else:
                size = threads.submit(lambda: len(self.codec.serialise(coded)))
            px = planes_to_pixels(coded.planes, self.img.pixels.shape[:2], settings.chroma, self.img.bits)
            n = self._measure(coded, px, size.result, settings)
        return coded, px, n

    def _measure(self, coded, pixels, payload_size, settings: Settings) -> Numbers:
        img = self.img
        if self._ssim_ref is None and metrics.ssim_applies(img.height, img.width):
            self._ssim_ref = metrics.SSIMReference(img.pixels, data_range=img.peak)
        p = metrics.psnr(img.pixels, pixels, data_range=img.peak)
        s = self._ssim_ref.ssim(pixels) if self._ssim_ref is not None else float("nan")
        size = _overhead_bytes(img, settings, self.shared_ref) + payload_size()  # the metadata these settings write
        raw = img.width * img.height * img.channels * img.bits / 8
        return Numbers(size, 8 * size / (img.width * img.height), raw / size, p, s, coded.kept, coded.step)