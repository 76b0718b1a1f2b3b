"""Colour conversion and chroma resampling.

RGB <-> YCbCr follows ITU-T T.871 (JFIF), full range, in units of 8-bit levels:

    Y  =       0.299 R + 0.587 G + 0.114 B
    Cb = 128 - 0.1687 R - 0.3313 G + 0.5 B      (exact: -0.299/1.772, -0.587/1.772)
    Cr = 128 + 0.5 R - 0.4187 G - 0.0813 B      (exact: -0.587/1.402, -0.114/1.402)

The matrices below are built from the luma weights (Kr = 0.299, Kb = 0.114) so that the
inverse is exact rather than a rounded table.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor

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
_OFFSETS = np.array([0.0, CHROMA_OFFSET, CHROMA_OFFSET])
# 3x4 affine forms for cv2.transform: [M | offset].
_FORWARD = np.hstack([RGB_TO_YCBCR, _OFFSETS[:, None]]).astype(np.float32)
_CHROMA_TO_RGB = np.hstack([YCBCR_TO_RGB[:, 1:], -(YCBCR_TO_RGB[:, 1:] @ _OFFSETS[1:])[:, None]]).astype(np.float32)


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
    x = image.astype(np.float32)
    if scale != 1:
        x *= np.float32(scale)
    if image.ndim == 2:
        return [x]
    # float32 is ample (the quantiser step is at least 0.01 level). OpenCV does the affine
    # transforms, always into numpy's buffers: OpenCV's own buffers of this size cost a
    # page fault per 4 KiB on first touch, more than the arithmetic.
    h, w = image.shape[:2]
    y = cv2.transform(x, _FORWARD[:1], dst=np.empty((h, w), np.float32))
    if chroma == "420":
        # Averaging is linear, so the chroma of the averaged RGB is the average of the
        # chroma: transforming a quarter of the pixels gives the same planes.
        x = np.pad(x, ((0, h % 2), (0, w % 2), (0, 0)), mode="edge") if (h | w) % 2 else x
        hc, wc = x.shape[0] // 2, x.shape[1] // 2
        x = cv2.resize(x, (wc, hc), dst=np.empty((hc, wc, 3), np.float32), interpolation=cv2.INTER_AREA)
    c = cv2.transform(x, _FORWARD[1:], dst=np.empty(x.shape[:2] + (2,), np.float32))
    return [y, np.ascontiguousarray(c[..., 0]), np.ascontiguousarray(c[..., 1])]


STRIP = 128  # output rows per task of the inverse: a strip's interpolated terms stay in cache
_POOL: ThreadPoolExecutor | None = None


def _pool() -> ThreadPoolExecutor:
    # OpenCV releases the GIL, so two strips run on two cores.
    global _POOL
    if _POOL is None:
        _POOL = ThreadPoolExecutor(max_workers=2, thread_name_prefix="workbench-colour")
    return _POOL


def _chroma_terms(cb: np.ndarray, cr: np.ndarray, r0: int, r1: int, width: int, chroma: str):
    """What Cb and Cr add to Y in each of R, G and B for image rows r0:r1: three (r1 - r0,
    width) float32.

    The term is linear in the chroma, so with 4:2:0 it is computed at chroma resolution
    and then interpolated, which equals interpolating the chroma first at a third of the
    work. The interpolation of a strip reads one chroma row beyond it on each side, so it
    equals the strip of the whole image's interpolation.
    """
    if chroma == "420":
        hc, wc = cb.shape
        s0, s1 = max(r0 // 2 - 1, 0), min((r1 + 1) // 2 + 1, hc)
        cb, cr = cb[s0:s1], cr[s0:s1]
    for c in range(3):
        wb, wr = float(YCBCR_TO_RGB[c, 1]), float(YCBCR_TO_RGB[c, 2])
        if chroma == "420":
            t = cv2.addWeighted(cb, wb, cr, wr, -CHROMA_OFFSET * (wb + wr))
            t = cv2.resize(t, (2 * wc, 2 * (s1 - s0)), interpolation=cv2.INTER_LINEAR)
            yield t[r0 - 2 * s0 : r1 - 2 * s0, :width]
        else:
            yield cv2.addWeighted(cb[r0:r1], wb, cr[r0:r1], wr, -CHROMA_OFFSET * (wb + wr))


def _colour_planes(planes):
    y, cb, cr = (np.asarray(p, dtype=np.float32) for p in planes)
    return y, cb, cr


def from_planes(planes: list[np.ndarray], shape: tuple[int, int], chroma: str) -> np.ndarray:
    """Inverse of :func:`to_planes` up to the 8-bit level scale: (H, W) grey or (H, W, 3) RGB
    float32, unclipped."""
    if len(planes) == 1:
        return np.array(planes[0], dtype=np.float32)
    y, cb, cr = _colour_planes(planes)
    return np.dstack([t + y for t in _chroma_terms(cb, cr, 0, shape[0], shape[1], chroma)])


def to_pixels(planes: list[np.ndarray], shape: tuple[int, int], chroma: str, bits: int) -> np.ndarray:
    """Decoded planes (8-bit level units) to integer pixels, rounded half to even and clipped.

    Parameters
    ----------
    planes : list of ndarray
        ``[Y]`` or ``[Y, Cb, Cr]`` as :func:`to_planes` makes them.
    shape : (int, int)
        Image height and width.
    chroma : {"420", "444"}
    bits : {8, 16}

    Returns
    -------
    ndarray
        (H, W) or (H, W, 3), uint8 or uint16.
    """
    if bits not in (8, 16):
        raise InputError(f"to_pixels needs 8 or 16 bits, got {bits}")
    # The sum, the scale to the output range, the rounding and the saturation are one
    # OpenCV pass per plane (saturate_cast rounds half to even).
    depth, gain = (cv2.CV_16U, 65535 / 255) if bits == 16 else (cv2.CV_8U, 1.0)
    if len(planes) == 1:
        y = np.asarray(planes[0], dtype=np.float32)
        return cv2.addWeighted(y, gain, y, 0.0, 0.0, dtype=depth)
    y, cb, cr = _colour_planes(planes)
    h, w = shape
    out = np.empty((h, w, 3), np.uint16 if bits == 16 else np.uint8)

    def strip(r0: int) -> None:
        r1 = min(r0 + STRIP, h)
        terms = _chroma_terms(cb, cr, r0, r1, w, chroma)
        cv2.merge([cv2.addWeighted(t, gain, y[r0:r1], gain, 0.0, dtype=depth) for t in terms], dst=out[r0:r1])

    list(_pool().map(strip, range(0, h, STRIP)))  # waits, and re-raises a strip's error
    return out
