"""Choosing the KLT block size and chroma sampling for a folder by rate–distortion cost
(``--block auto``, ``--chroma auto``).

A larger block lets the transform follow longer structure (a weave's period, a field's
smooth shading) but costs more per stored basis vector and fits less well on few patches;
4:4:4 chroma keeps colour detail that 4:2:0 halves, for more bits. Which wins depends on the
folder, so each candidate is tried on a sample of the folder's images at one step and the one
with the lowest Lagrangian cost ``J = squared error + lambda x bits`` (Everett's method, the
usual criterion for coding-mode decisions) is kept. The error is measured on the decoded
pixels (over R, G and B, divided by the channel count, in 8-bit levels) so that chroma
choices compare; ``lambda`` is the one the KLT codec uses to choose how many components to
keep, so the choice is made at the operating point the images will be coded at.

With a folder basis, the basis is fitted on half of the sample and the cost is measured on the
other half (a large block's basis fitted and judged on the same images flatters it; a lone
image is cut in two for this), and the stored basis counts as its share of the folder: its
bytes times the sampled fraction.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from . import codecs
from .codecs.klt import RD_LAMBDA
from .errors import InputError
from .formats.imagefiles import SourceImage
from .pipeline import encode, image_planes, planes_to_pixels
from .settings import BLOCK_SIZES, Settings

SAMPLE = 8


@dataclass(frozen=True)
class BlockCost:
    block: int
    chroma: str
    squared_error: float  # over the judged images' pixels, per channel, in 8-bit levels squared
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


def _halves(img: SourceImage) -> tuple[list[SourceImage], list[SourceImage]]:
    """A lone image split across its longer side: fit on one half, judge on the other."""
    px = img.pixels
    if px.shape[1] >= px.shape[0]:
        w = px.shape[1] // 2
        a, b = px[:, :w], px[:, w:]
    else:
        h = px.shape[0] // 2
        a, b = px[:h], px[h:]
    return [SourceImage(img.name + "[fit]", a)], [SourceImage(img.name + "[judged]", b)]


def _operating_step(img: SourceImage, settings: Settings) -> float:
    """The step the images will be coded at: the settings' own, or, with a target, the step
    the encoder's own search finds for it on ``img`` at the settings' block (targets depend
    little on the block)."""
    if settings.target is None:
        return settings.step
    return encode([img], settings, measure=False).images[0].step


def _count_for(settings: Settings, block: int) -> int | None:
    """The settings' count as the same fraction of ``block``'s components (None: all)."""
    if settings.count is None:
        return None
    count = max(1, round(settings.count * block ** 2 / settings.block ** 2))
    return None if count >= block ** 2 else count


def block_costs(images: list[SourceImage], settings: Settings, total: int | None = None, *,
                blocks=None, chromas=None) -> list[BlockCost]:
    """The cost of each candidate (block x chroma) on a sample of ``images`` (the whole folder
    holds ``total`` images, by default ``len(images)``). ``blocks`` default to
    :func:`candidates`, ``chromas`` to the settings' own; grey folders try one chroma."""
    if settings.method != "klt":
        raise InputError(f"block choice applies to the KLT, not to {settings.method!r}")
    if not images:
        raise InputError("no images to choose a block size on")
    codec = codecs.get("klt")
    sample = _sample(images, SAMPLE)
    total = total or len(images)
    blocks = tuple(blocks or candidates(sample))
    chromas = tuple(chromas or (settings.chroma,))
    if all(i.channels == 1 for i in sample):
        chromas = chromas[:1]
    step = _operating_step(sample[0], settings)
    fit, judged = None, sample
    if settings.basis_scope == "folder":
        fit, judged = (sample[::2], sample[1::2]) if len(sample) >= 2 else _halves(sample[0])
    out = []
    for chroma in chromas:
        for block in blocks:
            s = settings.replace(block=block, chroma=chroma, count=_count_for(settings, block), target=None, step=step)
            shared, bits = None, 0.0
            if settings.basis_scope == "folder":
                shared, raw, _ = codec.prepare_shared([image_planes(i, chroma) for i in (fit or sample)], s)
                # the judged images' share of the folder, counted in images of the sample's mean size
                share = sum(i.width * i.height for i in judged) / np.mean([i.width * i.height for i in sample])
                bits = 8.0 * len(raw) * share / total
            err, pixels = 0.0, 0
            for img in judged:
                coded = codec.quantise(codec.analyse(image_planes(img, chroma), s, shared), step=step, count=s.count)
                bits += 8.0 * len(codec.serialise(coded))
                rec = planes_to_pixels(coded.planes, img.pixels.shape[:2], chroma, img.bits)
                diff = (rec.astype(np.float64) - img.pixels) * (255.0 / img.peak)
                err += float(np.dot(diff.ravel(), diff.ravel())) / img.channels
                pixels += img.width * img.height
            out.append(BlockCost(block, chroma, err, bits, pixels, step))
    return out


def choose_block(images: list[SourceImage], settings: Settings, total: int | None = None, *,
                 blocks=None, chromas=None) -> tuple[Settings, list[BlockCost]]:
    """``settings`` with the block (and, given several ``chromas``, the chroma sampling) of
    lowest cost on ``images`` (see :func:`block_costs`), and every candidate's cost."""
    costs = block_costs(images, settings, total, blocks=blocks, chromas=chromas)
    best = min(costs, key=lambda c: c.cost)
    return settings.replace(block=best.block, chroma=best.chroma, count=_count_for(settings, best.block)), costs


def describe(costs: list[BlockCost], chosen: Settings) -> str:
    """One line: what was chosen and every candidate's rate and cost."""
    several = len({c.chroma for c in costs}) > 1
    name = (lambda c: f"{c.block}/{c.chroma}") if several else (lambda c: f"{c.block}")
    parts = ", ".join(f"{name(c)}: {c.bpp:.3f} bpp, cost {c.cost:.2f}" for c in costs)
    what = f"block {chosen.block}" + (f", chroma {chosen.chroma}" if several else "")
    return f"{what} chosen by rate–distortion cost at step {costs[0].step:.3g} ({parts})"
