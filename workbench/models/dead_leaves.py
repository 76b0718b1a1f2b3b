"""Synthetic dead-leaves images: a training prior for the shipped conv model.

The dead-leaves model (Matheron 1968; Lee, Mumford & Huang 2001, "Occlusion models for
natural images") stacks random shapes front to back until the plane is covered. With
radii drawn from a density proportional to ``r**-3`` it is scale invariant, and it has
the edges, occlusions and power spectrum of natural photographs; Achddou, Gousseau & Ladjal
(2021, "Synthetic images as a regularity prior for image restoration neural networks")
train restoration networks on such images, with colours sampled from natural images,
textured leaves, blur and noise. This module makes them from a seed, so the shipped model's
training data stay reproducible without a download.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

__all__ = ["dead_leaves"]


def _radius(rng, rmin: float, rmax: float) -> float:
    # inverse CDF of p(r) ~ r**-3 on [rmin, rmax]
    u = rng.random()
    return float((rmin ** -2 - u * (rmin ** -2 - rmax ** -2)) ** -0.5)


def _pink_noise(rng, size: int) -> np.ndarray:
    """A ``size`` x ``size`` field with a 1/f amplitude spectrum, zero mean, unit deviation."""
    f = np.fft.fftfreq(size)
    r = np.hypot(f[:, None], f[None, :])
    r[0, 0] = 1.0
    spec = (rng.standard_normal((size, size)) + 1j * rng.standard_normal((size, size))) / r ** rng.uniform(0.8, 1.3)
    spec[0, 0] = 0
    x = np.fft.ifft2(spec).real
    return x / (x.std() + 1e-12)


def dead_leaves(rng: np.random.Generator, size: int = 512, palette: np.ndarray | None = None,
                *, rmin: float = 2.0, rmax: float | None = None) -> np.ndarray:
    """One ``size`` x ``size`` RGB uint8 dead-leaves image.

    Parameters
    ----------
    rng : numpy.random.Generator
        Source of every random choice (the image is a function of its state).
    size : int
        Side in pixels (at least 32).
    palette : ndarray of shape (N, 3), optional
        Colours to draw the leaves' from (uint8 RGB, e.g. pixels of photographs); uniform
        random colours if None.
    rmin, rmax : float
        Range of leaf radii in output pixels (``rmax`` defaults to half the side).

    Returns
    -------
    ndarray of shape (size, size, 3), uint8
    """
    if size < 32:
        raise ValueError(f"dead_leaves: size must be at least 32, got {size}")
    if palette is not None:
        palette = np.asarray(palette)
        if palette.ndim != 2 or palette.shape[1] != 3 or len(palette) == 0:
            raise ValueError(f"dead_leaves: palette must have shape (N, 3), got {palette.shape}")
    # drawn at twice the size, then averaged down, so edges are anti-aliased as a lens would
    s = 2 * size
    lo, hi = 2 * rmin, 2 * (rmax if rmax is not None else size / 2)
    img = np.zeros((s, s, 3), np.float32)
    free = np.ones((s, s), bool)
    noise = _pink_noise(rng, s)
    left = s * s
    yy, xx = np.mgrid[0:s, 0:s]
    for _ in range(200000):
        if left <= 0.002 * s * s:
            break
        r = _radius(rng, lo, hi)
        cy, cx = rng.uniform(-r, s + r, 2)
        y0, y1 = max(0, int(cy - r)), min(s, int(cy + r) + 1)
        x0, x1 = max(0, int(cx - r)), min(s, int(cx + r) + 1)
        if y0 >= y1 or x0 >= x1:
            continue
        dy, dx = yy[y0:y1, x0:x1] - cy, xx[y0:y1, x0:x1] - cx
        kind = rng.random()
        if kind < 0.6:
            inside = dy * dy + dx * dx <= r * r
        elif kind < 0.85:  # a rotated rectangle
            a = rng.uniform(0, np.pi)
            u, v = dx * np.cos(a) + dy * np.sin(a), -dx * np.sin(a) + dy * np.cos(a)
            inside = (np.abs(u) <= r) & (np.abs(v) <= r * rng.uniform(0.2, 1.0))
        else:  # an ellipse
            a = rng.uniform(0, np.pi)
            u, v = dx * np.cos(a) + dy * np.sin(a), -dx * np.sin(a) + dy * np.cos(a)
            inside = (u / r) ** 2 + (v / (r * rng.uniform(0.2, 1.0))) ** 2 <= 1
        m = inside & free[y0:y1, x0:x1]
        n = int(m.sum())
        if n == 0:
            continue
        colour = (palette[rng.integers(len(palette))] if palette is not None
                  else rng.integers(0, 256, 3)).astype(np.float32)
        val = np.broadcast_to(colour, (n, 3)).copy()
        t = rng.random()
        if t < 0.35:  # shading across the leaf, as lit surfaces have
            g = rng.normal(0, 40, 2) / max(r, 1.0)
            val += (g[0] * dy[m] + g[1] * dx[m])[:, None]
        elif t < 0.6:  # a micro-texture: 1/f noise
            val += (noise[y0:y1, x0:x1][m] * rng.uniform(4, 30))[:, None] * rng.uniform(0.6, 1.0, 3)
        elif t < 0.7:  # stripes
            a, f = rng.uniform(0, np.pi), rng.uniform(0.05, 0.6)
            val += (np.sin(f * (dx[m] * np.cos(a) + dy[m] * np.sin(a)) + rng.uniform(0, 6.3))
                    * rng.uniform(5, 40))[:, None]
        img[y0:y1, x0:x1][m] = val
        free[y0:y1, x0:x1] &= ~inside
        left -= n
    if left > 0:
        img[free] = img[~free].mean(axis=0)
    img = img.reshape(size, 2, size, 2, 3).mean(axis=(1, 3))
    if rng.random() < 0.5:  # out of focus
        img = ndimage.gaussian_filter(img, (rng.uniform(0.3, 2.0),) * 2 + (0,))
    img += rng.normal(0, rng.uniform(0, 2.5), img.shape)  # sensor noise
    return np.clip(np.rint(img), 0, 255).astype(np.uint8)
