"""Colour conversion and chroma resampling.

RGB <-> YCbCr follows ITU-T T.871 (JFIF), full range, in units of 8-bit levels:

    Y  =       0.299 R + 0.587 G + 0.114 B
    Cb = 128 - 0.1687 R - 0.3313 G + 0.5 B      (exact: -0.299/1.772, -0.587/1.772)
    Cr = 128 + 0.5 R - 0.4187 G - 0.0813 B      (exact: -0.587/1.402, -0.114/1.402)

The matrices below are built from the luma weights (Kr = 0.299, Kb = 0.114) so that the
inverse is exact rather than a rounded table.
"""

from __future__ import annotations

import numpy as np

from .errors import InputError

KR, KB = 0.299, 0.114
KG = 1.0 - KR - KB
RGB_TO_YCBCR = np.array(
    [
        [KR, KG, KB],
        [-KR / (2 * (1 - KB)), -KG / (2 * (1 - KB)), 0.5],
        [0.5, -KG / (2 * (1 - KR)), -KB / (2 * (1 - KR))],
    ]
)
YCBCR_TO_RGB = np.linalg.inv(RGB_TO_YCBCR)
CHROMA_OFFSET = 128.0


def rgb_to_ycbcr(rgb: np.ndarray) -> np.ndarray:
    """Full-range RGB (H, W, 3), in 8-bit levels, to YCbCr (H, W, 3) float64 (T.871)."""
    rgb = np.asarray(rgb, dtype=np.float64)
    if rgb.ndim != 3 or rgb.shape[2] != 3:
        raise InputError(f"rgb_to_ycbcr needs an (H, W, 3) array, got shape {rgb.shape}")
    out = rgb @ RGB_TO_YCBCR.T
    out[..., 1:] += CHROMA_OFFSET
    return out


def ycbcr_to_rgb(ycc: np.ndarray) -> np.ndarray:
    """Inverse of :func:`rgb_to_ycbcr` (no clipping)."""
    ycc = np.array(ycc, dtype=np.float64)
    if ycc.ndim != 3 or ycc.shape[2] != 3:
        raise InputError(f"ycbcr_to_rgb needs an (H, W, 3) array, got shape {ycc.shape}")
    ycc[..., 1:] -= CHROMA_OFFSET
    return ycc @ YCBCR_TO_RGB.T


def downsample2(plane: np.ndarray) -> np.ndarray:
    """Halve a plane in both directions by 2x2 averaging (odd edges replicated)."""
    h, w = plane.shape
    p = np.pad(plane, ((0, h % 2), (0, w % 2)), mode="edge")
    return 0.25 * (p[0::2, 0::2] + p[1::2, 0::2] + p[0::2, 1::2] + p[1::2, 1::2])


def _up_axis(x: np.ndarray, axis: int) -> np.ndarray:
    # Triangle (linear) interpolation for samples centred between pairs of output samples.
    x = np.moveaxis(x, axis, 0)
    prev = np.concatenate([x[:1], x[:-1]])
    nxt = np.concatenate([x[1:], x[-1:]])
    out = np.empty((2 * x.shape[0],) + x.shape[1:])
    out[0::2] = 0.75 * x + 0.25 * prev
    out[1::2] = 0.75 * x + 0.25 * nxt
    return np.moveaxis(out, 0, axis)


def upsample2(plane: np.ndarray, shape: tuple[int, int]) -> np.ndarray:
    """Double a chroma plane by linear interpolation and crop to ``shape``."""
    up = _up_axis(_up_axis(np.asarray(plane, dtype=np.float64), 0), 1)
    return up[: shape[0], : shape[1]]


def to_planes(image: np.ndarray, chroma: str, scale: float) -> list[np.ndarray]:
    """Split an image into coding planes in 8-bit level units.

    Parameters
    ----------
    image : ndarray
        (H, W) grey or (H, W, 3) RGB, any integer dtype.
    chroma : {"420", "444"}
    scale : float
        Factor to 8-bit levels (1 for uint8, 255/65535 for uint16).

    Returns
    -------
    list of ndarray
        ``[Y]`` for grey, ``[Y, Cb, Cr]`` for colour (chroma halved for 4:2:0).
    """
    x = np.asarray(image, dtype=np.float64) * scale
    if x.ndim == 2:
        return [x]
    ycc = rgb_to_ycbcr(x)
    planes = [ycc[..., 0], ycc[..., 1], ycc[..., 2]]
    if chroma == "420":
        planes[1:] = [downsample2(p) for p in planes[1:]]
    return planes


def from_planes(planes: list[np.ndarray], shape: tuple[int, int], chroma: str) -> np.ndarray:
    """Inverse of :func:`to_planes` up to the 8-bit level scale (float64, unclipped)."""
    if len(planes) == 1:
        return planes[0]
    y, cb, cr = planes
    if chroma == "420":
        cb, cr = upsample2(cb, shape), upsample2(cr, shape)
    return ycbcr_to_rgb(np.stack([y, cb, cr], axis=-1))
