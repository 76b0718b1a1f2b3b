"""Quality metrics: PSNR, SSIM and per-tile error maps.

Colour images are measured on their RGB channels (alpha is coded losslessly and left
out): PSNR from the mean squared error over all colour samples; SSIM as the mean of the
per-channel SSIM maps (as scikit-image does with ``channel_axis``).
"""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np

from ..errors import InputError

SSIM_SIGMA = 1.5
SSIM_K1, SSIM_K2 = 0.01, 0.03
SSIM_TRUNCATE = 3.5


def _check_pair(ref, test, data_range):
    ref, test = np.asarray(ref), np.asarray(test)
    if ref.shape != test.shape:
        raise InputError(f"images differ in shape: {ref.shape} vs {test.shape}")
    if data_range is None:
        if ref.dtype == np.uint16:
            data_range = 65535.0
        elif ref.dtype == np.uint8:
            data_range = 255.0
        else:
            raise InputError(f"data_range is required for dtype {ref.dtype}")
    if not data_range > 0:
        raise InputError(f"data_range must be positive, got {data_range!r}")
    return ref, test, float(data_range)


def mse(ref: np.ndarray, test: np.ndarray) -> float:
    """Mean squared error, accumulated in float64."""
    ref, test = np.asarray(ref), np.asarray(test)
    if ref.dtype == test.dtype and ref.dtype in (np.uint8, np.uint16) and ref.ndim in (2, 3) and ref.size \
            and (ref.ndim == 2 or ref.shape[2] <= 4):
        # OpenCV sums the squared integer differences exactly, without float64 temporaries.
        return float(cv2.norm(np.ascontiguousarray(ref), np.ascontiguousarray(test), cv2.NORM_L2SQR)) / ref.size
    d = ref.astype(np.float64) - test.astype(np.float64)
    return float(np.mean(d * d))


def psnr(ref: np.ndarray, test: np.ndarray, *, data_range: float | None = None) -> float:
    """Peak signal-to-noise ratio in dB, ``10 log10(R^2 / MSE)``.

    ``data_range`` defaults to 255 for uint8 and 65535 for uint16. Identical images give ``inf``.
    """
    ref, test, r = _check_pair(ref, test, data_range)
    e = mse(ref, test)
    return float("inf") if e == 0 else float(10.0 * np.log10(r * r / e))


def _gaussian_kernel() -> np.ndarray:
    radius = int(SSIM_TRUNCATE * SSIM_SIGMA + 0.5)
    x = np.arange(-radius, radius + 1, dtype=np.float64)
    k = np.exp(-0.5 * (x / SSIM_SIGMA) ** 2)
    return k / k.sum()


_KERNEL = _gaussian_kernel()
_PAD = (len(_KERNEL) - 1) // 2


_KERNEL32 = _KERNEL.astype(np.float32)


def _blur(x: np.ndarray) -> np.ndarray:
    # OpenCV's separable filter is several times faster than scipy.ndimage here; its
    # BORDER_REFLECT ("cba|abc") is scipy's and scikit-image's "reflect".
    return cv2.sepFilter2D(x, cv2.CV_32F, _KERNEL32, _KERNEL32, borderType=cv2.BORDER_REFLECT)


STRIP = 64  # rows per pass: the working set of a strip stays in the processor's cache


class _ChannelRef:
    """What SSIM needs of one reference channel, computed once: its mean (removed, which
    keeps the variance terms accurate in float32), blurred mean and blurred variance.

    Maps are computed in strips of STRIP rows (plus the window's reach above and below):
    the arithmetic is a couple of dozen passes, and over a whole 4-megapixel channel those
    passes would be bound by memory traffic rather than by the processor.
    """

    def __init__(self, ref: np.ndarray, r: float):
        self.offset = np.float32(np.mean(ref, dtype=np.float64))
        x = np.subtract(ref, self.offset, dtype=np.float32)
        self.ux = _blur(x)
        self.var = _blur(x * x)
        self.var -= self.ux * self.ux
        self.xp = _pad_rows(x)
        self.c1 = np.float32((SSIM_K1 * r) ** 2)
        self.c2 = np.float32((SSIM_K2 * r) ** 2)

    def strips(self, test: np.ndarray):
        """Yield ``(r0, r1, ssim_map_rows)`` covering ``test`` top to bottom; the yielded
        array is reused for the next strip."""
        h = test.shape[0]
        tp = _pad_rows(test)
        off, c1, c2 = self.offset, self.c1, self.c2
        for r0 in range(0, h, STRIP):
            r1 = min(h, r0 + STRIP)
            y = np.subtract(tp[r0 : r1 + 2 * _PAD], off, dtype=np.float32)
            x = self.xp[r0 : r1 + 2 * _PAD]
            uy = _blur(y)[_PAD:-_PAD]
            cov = _blur(x * y)[_PAD:-_PAD]
            y *= y
            var_y = _blur(y)[_PAD:-_PAD]
            ux = self.ux[r0:r1]
            cov -= ux * uy
            var_y -= uy * uy
            mu_x = ux + off
            uy += off  # mu_y
            num = mu_x * uy
            num *= 2
            num += c1
            cov *= 2
            cov += c2
            num *= cov
            mu_x *= mu_x
            uy *= uy
            uy += mu_x
            uy += c1
            var_y += self.var[r0:r1]
            var_y += c2
            uy *= var_y
            num /= uy
            yield r0, r1, num

    def mean(self, test: np.ndarray) -> float:
        """Mean of the SSIM map without the border of _PAD pixels."""
        h, w = test.shape
        total = 0.0
        for r0, r1, m in self.strips(test):
            a, b = max(r0, _PAD), min(r1, h - _PAD)
            if b > a:
                total += float(np.sum(m[a - r0 : b - r0, _PAD : w - _PAD], dtype=np.float64))
        return total / ((h - 2 * _PAD) * (w - 2 * _PAD))


def _pad_rows(a: np.ndarray) -> np.ndarray:
    """``a`` with _PAD rows mirrored above and below (the blur's BORDER_REFLECT)."""
    return cv2.copyMakeBorder(np.ascontiguousarray(a), _PAD, _PAD, 0, 0, cv2.BORDER_REFLECT)


def ssim_map(ref: np.ndarray, test: np.ndarray, *, data_range: float | None = None) -> np.ndarray:
    """SSIM map of one channel (Wang, Bovik, Sheikh & Simoncelli, 2004).

    Gaussian window sigma = 1.5 truncated at 3.5 sigma (11 taps), K1 = 0.01, K2 = 0.03,
    population (not sample) covariances, borders reflected.

    Notes
    -----
    Computed in float32 on data with the reference mean removed (which keeps the variance
    terms accurate).
    """
    ref, test, r = _check_pair(ref, test, data_range)
    if ref.ndim != 2:
        raise InputError(f"ssim_map takes one channel, got shape {ref.shape}")
    out = np.empty(ref.shape, np.float32)
    for r0, r1, m in _ChannelRef(ref, r).strips(test):
        out[r0:r1] = m
    return out


class SSIMReference:
    """SSIM against one fixed reference image, with the reference's share of the work done
    once: for a slider that keeps re-measuring reconstructions of the same original.

    ``SSIMReference(ref).ssim(test)`` equals ``ssim(ref, test)``.
    """

    def __init__(self, ref: np.ndarray, *, data_range: float | None = None):
        ref, _, self.r = _check_pair(ref, ref, data_range)
        if min(ref.shape[:2]) <= 2 * _PAD:
            raise InputError(f"SSIM needs images larger than {2 * _PAD + 1} pixels, got {ref.shape[:2]}")
        self.shape = ref.shape
        chans = [ref] if ref.ndim == 2 else cv2.split(np.ascontiguousarray(ref))
        self.channels = [_ChannelRef(c, self.r) for c in chans]

    def ssim(self, test: np.ndarray) -> float:
        test = np.asarray(test)
        if test.shape != self.shape:
            raise InputError(f"images differ in shape: {self.shape} vs {test.shape}")
        chans = [test] if test.ndim == 2 else cv2.split(np.ascontiguousarray(test))
        return float(np.mean([ch.mean(t) for ch, t in zip(self.channels, chans)]))


SSIM_MIN_SIDE = 11  # the Gaussian window's 11 taps: smaller images have no SSIM


def ssim_applies(height: int, width: int) -> bool:
    """Whether an image is large enough for SSIM (both sides above the window's 11 taps)."""
    return min(height, width) > SSIM_MIN_SIDE


def ssim(ref: np.ndarray, test: np.ndarray, *, data_range: float | None = None) -> float:
    """Mean SSIM, border of 5 pixels excluded; colour = mean over RGB channels.

    Matches ``skimage.metrics.structural_similarity(..., gaussian_weights=True, sigma=1.5,
    use_sample_covariance=False, data_range=R)``.
    """
    ref, test, r = _check_pair(ref, test, data_range)
    return SSIMReference(ref, data_range=r).ssim(test)


@dataclass(frozen=True)
class TileMap:
    """Per-tile PSNR of a reconstruction.

    Attributes
    ----------
    psnr : ndarray (rows, cols)
        PSNR of each tile in dB (``inf`` for exact tiles).
    tile : int
        Tile side in pixels; edge tiles may be smaller.
    """

    psnr: np.ndarray
    tile: int

    def worst(self, n: int = 1) -> list[tuple[int, int, float]]:
        """The ``n`` worst tiles as ``(x, y, psnr)`` with pixel coordinates of the top-left corner."""
        flat = np.argsort(self.psnr, axis=None, kind="stable")[:n]
        rows, cols = np.unravel_index(flat, self.psnr.shape)
        return [(int(c) * self.tile, int(r) * self.tile, float(self.psnr[r, c])) for r, c in zip(rows, cols)]


def tile_psnr(ref: np.ndarray, test: np.ndarray, *, tile: int = 32, data_range: float | None = None) -> TileMap:
    """PSNR of each ``tile`` x ``tile`` block (colour channels pooled)."""
    ref, test, r = _check_pair(ref, test, data_range)
    if ref.dtype in (np.uint8, np.uint16) and ref.dtype == test.dtype and (ref.ndim == 2 or ref.shape[2] <= 4):
        d = cv2.absdiff(np.ascontiguousarray(ref), np.ascontiguousarray(test))
        sq = cv2.multiply(d, d, dtype=cv2.CV_32F)  # exact for 8-bit, 6e-8 relative for 16-bit
    else:
        d = ref.astype(np.float64) - test.astype(np.float64)
        sq = d * d
    channels = 1 if sq.ndim == 2 else sq.shape[2]
    if sq.ndim == 3:  # channel sum: exact in float32 for 8-bit squares
        sq = cv2.transform(sq, np.ones((1, channels))) if sq.dtype == np.float32 else sq.sum(axis=2)
    h, w = sq.shape
    rows, cols = -(-h // tile), -(-w // tile)
    padded = np.zeros((rows * tile, cols * tile), sq.dtype)
    padded[:h, :w] = sq
    sums = padded.reshape(rows, tile, cols, tile).sum(axis=(1, 3), dtype=np.float64)
    hs = np.minimum(tile, h - np.arange(rows) * tile)
    ws = np.minimum(tile, w - np.arange(cols) * tile)
    m = sums / (hs[:, None] * ws[None, :] * channels)
    with np.errstate(divide="ignore"):
        p = np.where(m > 0, 10 * np.log10(r * r / np.where(m > 0, m, 1)), np.inf)
    return TileMap(p, tile)
