"""Colour conversion and chroma resampling.

RGB <-> YCbCr follows ITU-T T.871 (JFIF), full range, in units of 8-bit levels:

    Y  =       0.299 R + 0.587 G + 0.114 B
    Cb = 128 - 0.1687 R - 0.3313 G + 0.5 B      (exact: -0.299/1.772, -0.587/1.772)
    Cr = 128 + 0.5 R - 0.4187 G - 0.0813 B      (exact: -0.587/1.402, -0.114/1.402)

The matrices below are built from the luma weights (Kr = 0.299, Kb = 0.114) so that the
inverse is exact rather than a rounded table.
"""

from __future__ import annotations

import cv2
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


def upsample2(plane: np.ndarray, shape: tuple[int, int]) -> np.ndarray:
    """Double a chroma plane by linear interpolation (sample centres between output pairs,
    edges replicated, weights 3/4 and 1/4) and crop to ``shape``.

    OpenCV's INTER_LINEAR with half-pixel centres is exactly this filter, and fast.
    """
    p = np.ascontiguousarray(plane, dtype=np.float32)
    h, w = p.shape
    up = cv2.resize(p, (2 * w, 2 * h), interpolation=cv2.INTER_LINEAR)
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
    image = np.asarray(image)
    if image.ndim == 2:
        return [image.astype(np.float64) * scale]
    rgb = [image[..., c].astype(np.float64) * scale for c in range(3)]
    m = RGB_TO_YCBCR
    planes = [m[i, 0] * rgb[0] + m[i, 1] * rgb[1] + m[i, 2] * rgb[2] + (CHROMA_OFFSET if i else 0.0)
              for i in range(3)]
    if chroma == "420":
        planes[1:] = [downsample2(p) for p in planes[1:]]
    return planes


def to_channels(planes: list[np.ndarray], shape: tuple[int, int], chroma: str) -> list[np.ndarray]:
    """Inverse of :func:`to_planes` up to the 8-bit level scale: contiguous float32 channel
    planes (one for grey, R, G, B for colour), unclipped."""
    if len(planes) == 1:
        return [np.asarray(planes[0], dtype=np.float32)]
    y, cb, cr = (np.asarray(p, dtype=np.float32) for p in planes)
    if chroma == "420":
        cb, cr = upsample2(cb, shape), upsample2(cr, shape)
    cb = cb - np.float32(CHROMA_OFFSET)
    cr = cr - np.float32(CHROMA_OFFSET)
    m = YCBCR_TO_RGB.astype(np.float32)
    return [y + cr * m[0, 2], y + cb * m[1, 1] + cr * m[1, 2], y + cb * m[2, 1]]


def from_planes(planes: list[np.ndarray], shape: tuple[int, int], chroma: str) -> np.ndarray:
    """(H, W) or (H, W, 3) array form of :func:`to_channels`."""
    ch = to_channels(planes, shape, chroma)
    return ch[0] if len(ch) == 1 else np.dstack(ch)
