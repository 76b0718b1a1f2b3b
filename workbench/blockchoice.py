"""Choosing the KLT block size for a folder by rate–distortion cost (``--block auto``).

A larger block lets the transform follow longer structure (a weave's period, a field's
smooth shading) but costs more per stored basis vector and fits less well on few patches.
Which wins depends on the folder, so each candidate block is tried on a sample of the
folder's images at one step and the one with the lowest Lagrangian cost
``J = squared error + lambda x bits`` (Everett's method, the usual criterion for coding-mode
decisions) is kept. ``lambda`` is the one the KLT codec already uses to choose how many
components to keep, so the choice is made at the operating point the images will be coded at.

With a folder basis, the basis is fitted on half of the sample and the cost is measured on the
other half (a large block's basis fitted and judged on the same images flatters it), and the
stored basis counts as its share of the folder: its bytes times the sampled fraction.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import codecs
from .codecs.klt import RD_LAMBDA
from .errors import InputError
from .formats.imagefiles import SourceImage
from .pipeline import image_planes, plane_quality
from .ratecontrol import search_step
from .settings import BLOCK_SIZES, Settings

SAMPLE = 8


@dataclass(frozen=True)
class BlockCost:
    block: int
    squared_error: float  # over every plane sample of the judged images, in 8-bit levels squared
    bits: float
    pixels: int
    step: float

    @property
    def cost(self) -> float:
        """Lagrangian cost per pixel: squared error per pixel + lambda x bits per pixel."""
        return (self.squared_error + RD_LAMBDA * self.step ** 2 * self.bits) / self.pixels

    @property
    def bpp(self) -> float:
        return self.bits / self.pixels


def _sample(images: list[SourceImage], n: int) -> list[SourceImage]:
    if len(images) <= n:
        return list(images)
    idx = np.linspace(0, len(images) - 1, n).round().astype(int)
    return [images[i] for i in dict.fromkeys(idx)]


def candidates(images: list[SourceImage]) -> tuple[int, ...]:
    """The block sizes worth trying: those no larger than every sampled image's short side / 2."""
    side = min(min(i.width, i.height) for i in images)
    out = tuple(b for b in BLOCK_SIZES if 2 * b <= side)
    return out or (min(BLOCK_SIZES),)


def _operating_step(img: SourceImage, settings: Settings) -> float:
    """The step the images will be coded at: the settings' own, or, with a target, the step
    that meets it on ``img`` at the default block (targets depend little on the block)."""
    if settings.target is None:
        return settings.step
    codec = codecs.get("klt")
    s = settings.replace(target=None)
    a = codec.analyse(image_planes(img, s.chroma), s)
    kind, value = settings.target

    def evaluate(step):
        coded = codec.quantise(a, step=step, count=settings.count)
        if kind == "bpp":
            return 8 * len(codec.serialise(coded)) / (img.width * img.height)
        return plane_quality(kind, img, coded.planes, s.chroma)

    return search_step(evaluate, kind, value)[0]


def block_costs(images: list[SourceImage], settings: Settings, total: int | None = None) -> list[BlockCost]:
    """The cost of each candidate block on a sample of ``images`` (the whole folder holds
    ``total`` images, by default ``len(images)``); the settings' count is kept as a fraction
    of each block's components."""
    if settings.method != "klt":
        raise InputError(f"block choice applies to the KLT, not to {settings.method!r}")
    if not images:
        raise InputError("no images to choose a block size on")
    codec = codecs.get("klt")
    sample = _sample(images, SAMPLE)
    total = total or len(images)
    step = _operating_step(sample[0], settings)
    folder = settings.basis_scope == "folder" and len(sample) >= 2
    fit, judged = (sample[::2], sample[1::2]) if folder else (None, sample)
    out = []
    for block in candidates(sample):
        count = None if settings.count is None else max(1, round(settings.count * block ** 2 / settings.block ** 2))
        s = settings.replace(block=block, count=None if count is None or count >= block ** 2 else count,
                             target=None, step=step)
        shared, bits = None, 0.0
        if settings.basis_scope == "folder":
            shared, raw, _ = codec.prepare_shared([image_planes(i, s.chroma) for i in (fit or sample)], s)
            bits = 8.0 * len(raw) * len(judged) / total
        err, pixels = 0.0, 0
        for img in judged:
            planes = image_planes(img, s.chroma)
            coded = codec.quantise(codec.analyse(planes, s, shared), step=step, count=s.count)
            bits += 8.0 * len(codec.serialise(coded))
            err += sum(float(np.sum((o - r) ** 2, dtype=np.float64)) for o, r in zip(planes, coded.planes))
            pixels += img.width * img.height
        out.append(BlockCost(block, err, bits, pixels, step))
    return out


def choose_block(images: list[SourceImage], settings: Settings,
                 total: int | None = None) -> tuple[Settings, list[BlockCost]]:
    """``settings`` with the block of lowest cost on ``images`` (see :func:`block_costs`),
    and every candidate's cost."""
    costs = block_costs(images, settings, total)
    best = min(costs, key=lambda c: c.cost)
    count = settings.count
    if count is not None:
        count = max(1, round(count * best.block ** 2 / settings.block ** 2))
        count = None if count >= best.block ** 2 else count
    return settings.replace(block=best.block, count=count), costs


def describe(costs: list[BlockCost], chosen: int) -> str:
    """One line: the chosen block and every candidate's rate and cost."""
    parts = ", ".join(f"{c.block}: {c.bpp:.3f} bpp, cost {c.cost:.2f}" for c in costs)
    return f"block {chosen} chosen by rate–distortion cost at step {costs[0].step:.3g} ({parts})"

