"""Detectors re-run on a reconstruction only where it can differ from the original's result.

A reconstruction differs from its original by an error ``e`` that is small almost
everywhere. The responses the spot and edge detectors threshold are linear filters of the
image (the scale-normalised Laplacian of Gaussian of ``skimage.feature.blob_log``; the
smoothed gradient of ``skimage.feature.canny``), so a response on the reconstruction is the
original's plus the same filter of ``e``, which is at most the filter's L1 gain times the
largest ``|e|`` within its reach. Wherever that bound keeps the response below the detector's
threshold, the detector cannot fire on the reconstruction there; only the rest (tiles near
objects, or where the error is large) is recomputed, by the same library calls on crops wide
enough that every value kept is the value the whole-image call computes. The results equal
scikit-image's functions called on the whole reconstruction (``tests/test_localdetect.py``
checks it on scikit-image's bundled images); they only come sooner where little can change.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import ndimage as ndi

TILE = 16  # the edge detector's candidate tiles: at least its crops' margin (see CannyEdges)
SPOT_TILE = 8  # the spot detector's crops have no chains to keep whole: finer tiles fit tighter
SPLIT_ALWAYS = 8  # tiles: a sparse box longer than this is halved whatever its halves cost
CALL_COST = 6000  # pixels: what one more crop's calls cost, in filtered pixels' time (measured)
FULL_FRACTION = 0.5  # above this share of candidate tiles the whole-image call is cheaper
SLACK = 1e-4  # relative; with ABS_SLACK covers float32 rounding between the two computations
ABS_SLACK = 1e-5


def tile_max(a: np.ndarray, tile: int = TILE, fill: float = -np.inf) -> np.ndarray:
    """Maximum of ``a`` (H, W) over ``tile`` x ``tile`` tiles; partial tiles at the far edges
    count what they hold."""
    h, w = a.shape
    th, tw = -(-h // tile), -(-w // tile)
    if (th * tile, tw * tile) != (h, w):
        padded = np.full((th * tile, tw * tile), fill, dtype=a.dtype)
        padded[:h, :w] = a
        a = padded
    return a.reshape(th, tile, tw, tile).max(axis=(1, 3))


def _reach_max(t: np.ndarray, radius: int, tile: int = TILE) -> np.ndarray:
    """Per tile, the maximum over every tile that a window of ``radius`` pixels around any
    of its pixels touches."""
    k = -(-radius // tile)
    return ndi.maximum_filter(t, size=2 * k + 1, mode="nearest") if k else t


def l1_gain(linear_filter, radius: int) -> float:
    """The L1 norm of a linear filter's impulse response, read off a delta image with room
    for the whole response."""
    n = 2 * radius + 3
    delta = np.zeros((n, n), np.float64)
    delta[n // 2, n // 2] = 1.0
    return float(np.abs(linear_filter(delta)).sum())


def _groups(candidate: np.ndarray):
    """``(tile slices, core tiles)`` per 8-connected group of candidate tiles."""
    labels, _ = ndi.label(candidate, np.ones((3, 3), bool))
    for index, sl in enumerate(ndi.find_objects(labels), start=1):
        if sl is not None:
            yield sl, labels[sl] == index


def _rectangles(candidate: np.ndarray, margin: int, tile: int = TILE) -> list[tuple[int, int, int, int]]:
    """Tile rectangles ``(y0, y1, x0, x1)`` that together hold every candidate tile once, by
    halving while the halves' crops (each grown by ``margin`` pixels) cost less than the whole's."""
    def cost(y0, y1, x0, x1):
        return ((y1 - y0) * tile + 2 * margin) * ((x1 - x0) * tile + 2 * margin) + CALL_COST

    def tight(y0, y1, x0, x1):
        sub = candidate[y0:y1, x0:x1]
        rows, cols = np.flatnonzero(sub.any(axis=1)), np.flatnonzero(sub.any(axis=0))
        if not len(rows):
            return None
        return y0 + rows[0], y0 + rows[-1] + 1, x0 + cols[0], x0 + cols[-1] + 1

    out = []
    todo = [tight(0, candidate.shape[0], 0, candidate.shape[1])]
    while todo:
        box = todo.pop()
        if box is None:
            continue
        y0, y1, x0, x1 = box
        best = None
        for axis in (0, 1):
            lo, hi = (y0, y1) if axis == 0 else (x0, x1)
            if hi - lo < 2:
                continue
            mid = (lo + hi) // 2
            halves = [tight(y0, mid, x0, x1), tight(mid, y1, x0, x1)] if axis == 0 else \
                [tight(y0, y1, x0, mid), tight(y0, y1, mid, x1)]
            price = sum(cost(*b) for b in halves if b is not None)
            # halving a sparse box often pays only a level or two further down: large sparse
            # boxes are halved anyway, small ones only when that pays at once
            worth = price < cost(*box) or (max(y1 - y0, x1 - x0) > SPLIT_ALWAYS and
                                           candidate[y0:y1, x0:x1].mean() < 0.5)
            if worth and (best is None or price < best[0]):
                best = (price, halves)
        if best is None:
            out.append(box)
        else:
            todo += best[1]
    return out


def _crops(candidate: np.ndarray, shape, margin: int, tile: int = TILE):
    """Per group: the pixel crop (slices, grown by ``margin``, within the image) and its core
    mask in the crop's coordinates (the group's candidate tiles)."""
    h, w = shape
    for (sy, sx), core_tiles in _groups(candidate):
        y0, x0 = sy.start * tile, sx.start * tile
        y1, x1 = min(sy.stop * tile, h), min(sx.stop * tile, w)
        cy0, cx0 = max(y0 - margin, 0), max(x0 - margin, 0)
        cy1, cx1 = min(y1 + margin, h), min(x1 + margin, w)
        core = np.zeros((cy1 - cy0, cx1 - cx0), bool)
        pixels = np.repeat(np.repeat(core_tiles, tile, axis=0), tile, axis=1)[: y1 - y0, : x1 - x0]
        core[y0 - cy0: y1 - cy0, x0 - cx0: x1 - cx0] = pixels
        yield (slice(cy0, cy1), slice(cx0, cx1)), core


def _inner_tiles(n: int, distance: int, tile: int = TILE) -> np.ndarray:
    """Per tile along an axis of ``n`` pixels: whether all its pixels lie ``distance`` or
    more from both ends."""
    start = np.arange(-(-n // tile)) * tile
    stop = np.minimum(start + tile, n)
    return (start >= distance) & (stop - 1 <= n - 1 - distance)


def _weights(sigma, order: int, radius: int) -> np.ndarray:
    """The weights ``scipy.ndimage.gaussian_filter1d(.., sigma, order=order)`` correlates
    with, read off its response to a delta (exact: one product per output)."""
    delta = np.zeros(2 * radius + 1)
    delta[radius] = 1.0
    return ndi.gaussian_filter1d(delta, sigma, order=order, mode="constant", truncate=4.0)[::-1].copy()


def _gauss_radius(sigma: float, truncate: float = 4.0) -> int:
    return int(truncate * float(sigma) + 0.5)  # scipy.ndimage's kernel radius


def _overlaps(b1: np.ndarray, b2: np.ndarray) -> np.ndarray:
    """Area overlap fractions of 2-D blobs ``(y, x, sigma)`` row by row, in float64: the
    formula of ``skimage.feature.blob._blob_overlap`` (disk radii sigma * sqrt(2))."""
    b1, b2 = b1.astype(np.float64), b2.astype(np.float64)
    s1, s2 = b1[:, 2], b2[:, 2]
    big = np.maximum(s1, s2)
    r1, r2 = s1 / big, s2 / big
    d = np.hypot(*((b2[:, :2] - b1[:, :2]) / (big[:, None] * math.sqrt(2))).T)
    out = np.zeros(len(d))
    out[d <= np.abs(r1 - r2)] = 1.0
    part = (d > np.abs(r1 - r2)) & (d <= r1 + r2)
    d, r1, r2 = d[part], r1[part], r2[part]
    acos1 = np.arccos(np.clip((d**2 + r1**2 - r2**2) / (2 * d * r1), -1, 1))
    acos2 = np.arccos(np.clip((d**2 + r2**2 - r1**2) / (2 * d * r2), -1, 1))
    rest = np.sqrt(np.abs((-d + r2 + r1) * (d - r2 + r1) * (d + r2 - r1) * (d + r2 + r1)))
    out[part] = (r1**2 * acos1 + r2**2 * acos2 - 0.5 * rest) / (np.pi * np.minimum(r1, r2) ** 2)
    return out


def prune_blobs(blobs: np.ndarray, overlap: float) -> np.ndarray:
    """``blob_log``'s last step (``skimage.feature.blob._prune_blobs``, 2-D, one sigma) with
    the same result: pairs within reach in the same order, and for each pair of blobs both
    still kept whose overlap exceeds ``overlap``, the smaller (the first, if equal) dropped.
    The overlaps are computed for all pairs at once, and again by scikit-image's own function
    for those within rounding of ``overlap``; only the dropping is a loop."""
    from scipy import spatial

    sigma = blobs[:, -1:].max()
    distance = 2 * sigma * math.sqrt(blobs.shape[1] - 1)
    pairs = np.array(list(spatial.cKDTree(blobs[:, :-1]).query_pairs(distance)))
    if len(pairs) == 0:
        return blobs
    ov = _overlaps(blobs[pairs[:, 0]], blobs[pairs[:, 1]])
    close = np.flatnonzero(np.abs(ov - overlap) < 1e-5)
    if len(close):
        try:
            from skimage.feature.blob import _blob_overlap
        except ImportError:  # the float64 value is then the best there is
            _blob_overlap = None
        if _blob_overlap is not None:
            for k in close:
                ov[k] = _blob_overlap(blobs[pairs[k, 0]], blobs[pairs[k, 1]], sigma_dim=1)
    kept = np.ones(len(blobs), bool)
    sig = blobs[:, -1]
    for i, j in pairs[ov > overlap].tolist():
        if kept[i] and kept[j]:
            if sig[i] > sig[j]:
                kept[j] = False
            else:
                kept[i] = False
    return blobs[kept]


class LogSpots:
    """``skimage.feature.blob_log`` on reconstructions of one original, in 2-D with a scalar
    sigma range, linear sigma spacing and no border exclusion (its defaults).

    Parameters
    ----------
    original : (H, W) float32 grey image in [0, 1]
    min_sigma, max_sigma, num_sigma, threshold, overlap : as ``blob_log``
    """

    def __init__(self, original: np.ndarray, *, min_sigma: float, max_sigma: float, num_sigma: int,
                 threshold: float, overlap: float = 0.5):
        original = np.asarray(original)
        if original.ndim != 2 or original.dtype != np.float32:
            raise ValueError(f"LogSpots needs a 2-D float32 image, not {original.dtype} {original.shape}")
        self.original = original
        self.params = dict(min_sigma=min_sigma, max_sigma=max_sigma, num_sigma=num_sigma,
                           threshold=threshold, overlap=overlap)
        self.threshold, self.overlap = threshold, overlap
        # blob_log's own sigma list: per-axis float32 arrays, linearly spaced
        self.sigmas = np.linspace(np.full(2, min_sigma, np.float32), np.full(2, max_sigma, np.float32), num_sigma)
        self.radii = [_gauss_radius(s.max()) for s in self.sigmas]
        self.margin = max(self.radii) + 2  # exact cube values on the core and one pixel around it
        self.gains = [l1_gain(lambda d, s=s: ndi.gaussian_laplace(d, s) * np.mean(s) ** 2, r)
                      for s, r in zip(self.sigmas, self.radii)]
        self._kernels = [(_weights(s[0], 0, r), _weights(s[0], 2, r), np.mean(s) ** 2)
                         for s, r in zip(self.sigmas, self.radii)]
        cube = self._cube(original)
        self.tiles = [tile_max(cube[..., i], SPOT_TILE) for i in range(len(self.sigmas))]
        if np.ptp(original) == 0:
            self.blobs = self._full(original)  # peak_local_max finds nothing in a flat cube
        else:
            self.blobs = self._finish(*self._peaks(cube, None, 0, 0))

    def _cube(self, g):
        cube = np.empty(g.shape + (len(self.sigmas),), np.float32)
        for i in range(len(self.sigmas)):
            cube[..., i] = self._response(g, i)
        return cube

    def _peaks(self, cube, core, y0, x0):
        """Local maxima above the threshold (``peak_local_max`` with blob_log's footprint) at
        ``core`` pixels (all, if None) of a cube whose values there and one pixel around are
        exact: their (y, x, sigma index) offset by ``(y0, x0)``, and their values."""
        # a maximum over the 3x3x3 footprint with 'nearest' edges is a value no smaller than
        # each of its 26 neighbours (indices clipped): compared only where the threshold is
        # passed, and dropped at the first larger neighbour
        above = cube > self.threshold
        if core is not None:
            above &= core[..., None]
        yy, xx, ss = np.nonzero(above)
        vals = cube[yy, xx, ss]
        padded = np.pad(cube, 1, mode="edge")  # 'nearest': the edge value repeated
        h, w, n = padded.shape
        flat = padded.ravel()
        at = ((yy + 1) * w + (xx + 1)) * n + (ss + 1)
        for dy in (-1, 0, 1):
            for dx in (-1, 0, 1):
                for ds in (-1, 0, 1):
                    if dy == dx == ds == 0 or not len(vals):
                        continue
                    keep = vals >= flat[at + (dy * w + dx) * n + ds]
                    at, vals = at[keep], vals[keep]
        ss = at % n - 1
        xx = (at // n) % w - 1
        yy = at // (n * w) - 1
        return np.stack([yy + y0, xx + x0, ss], axis=1), vals

    def _finish(self, coords, values):
        """blob_log's last steps on the local maxima: in peak_local_max's order (raster order
        of the cube, then by falling value), sigma in place of its index, overlaps pruned."""
        if not len(coords):
            return np.empty((0, 3))
        raster = np.lexsort((coords[:, 2], coords[:, 1], coords[:, 0]))
        coords, values = coords[raster], values[raster]
        local_maxima = coords[np.argsort(-values, kind="stable")]
        lm = local_maxima.astype(np.float32)
        sig = self.sigmas[local_maxima[:, -1]][:, 0:1]
        return prune_blobs(np.hstack([lm[:, :-1], sig]), self.overlap)

    def _response(self, g, i, rows=slice(None), cols=slice(None)):
        """``-gaussian_laplace(g, sigma_i) * mean(sigma_i)**2`` (blob_log's scale-normalised
        response) at ``g[rows, cols]``: the same four 1-D correlations in the same order, bit
        for bit, with the kernels made once and the second of each pair run only on the rows
        asked for."""
        w0, w2, scale = self._kernels[i]
        out = ndi.correlate1d(g, w2, 0, np.float32, "reflect", 0.0, 0)[rows]
        out = ndi.correlate1d(out, w0, 1, np.float32, "reflect", 0.0, 0)[:, cols]
        tmp = ndi.correlate1d(g, w0, 0, np.float32, "reflect", 0.0, 0)[rows]
        out += ndi.correlate1d(tmp, w2, 1, np.float32, "reflect", 0.0, 0)[:, cols]
        return -out * scale

    def _full(self, g):
        from skimage.feature import blob_log

        p = self.params
        return blob_log(g, min_sigma=p["min_sigma"], max_sigma=p["max_sigma"], num_sigma=p["num_sigma"],
                        threshold=p["threshold"], overlap=p["overlap"])

    def candidates(self, g: np.ndarray) -> np.ndarray:
        """Tiles where ``g``'s response can exceed the threshold (bool, tile grid)."""
        err = tile_max(np.abs(g - self.original), SPOT_TILE, fill=0.0)
        limit = self.threshold * (1 - SLACK) - ABS_SLACK
        out = np.zeros(err.shape, bool)
        for t, gain, r in zip(self.tiles, self.gains, self.radii):
            out |= t + gain * (1 + SLACK) * _reach_max(err, r, SPOT_TILE) > limit
        return out

    def detect(self, g: np.ndarray) -> np.ndarray:
        """``blob_log(g, ...)``'s rows (y, x, sigma), recomputed only where they can change."""
        g = np.asarray(g)
        if g.shape != self.original.shape or g.dtype != np.float32:
            raise ValueError(f"expected a float32 image of shape {self.original.shape}, not {g.dtype} {g.shape}")
        if np.ptp(g) == 0:
            return self._full(g)
        cand = self.candidates(g)
        if cand.mean() > FULL_FRACTION:  # the whole cube at once, with the faster pruning
            return self._finish(*self._peaks(self._cube(g), None, 0, 0))
        h, w = g.shape
        found, values = [], []
        for ty0, ty1, tx0, tx1 in _rectangles(cand, self.margin, SPOT_TILE):
            y0, y1, x0, x1 = ty0 * SPOT_TILE, min(ty1 * SPOT_TILE, h), tx0 * SPOT_TILE, min(tx1 * SPOT_TILE, w)
            # the cube is needed exactly on the core and the ring of neighbours its maxima see
            by0, by1, bx0, bx1 = max(y0 - 1, 0), min(y1 + 1, h), max(x0 - 1, 0), min(x1 + 1, w)
            cube = np.empty((by1 - by0, bx1 - bx0, len(self.sigmas)), np.float32)
            for i, (s, r) in enumerate(zip(self.sigmas, self.radii)):
                m = r + 2  # each scale's own reach: small scales need narrow crops
                cy0, cx0 = max(by0 - m, 0), max(bx0 - m, 0)
                crop = np.ascontiguousarray(g[cy0: min(by1 + m, h), cx0: min(bx1 + m, w)])
                cube[..., i] = self._response(crop, i, slice(by0 - cy0, by1 - cy0), slice(bx0 - cx0, bx1 - cx0))
            core = np.zeros(cube.shape[:2], bool)
            tiles = np.repeat(np.repeat(cand[ty0:ty1, tx0:tx1], SPOT_TILE, axis=0), SPOT_TILE, axis=1)
            core[y0 - by0: y1 - by0, x0 - bx0: x1 - bx0] = tiles[: y1 - y0, : x1 - x0]
            c, v = self._peaks(cube, core, by0, bx0)
            found.append(c)
            values.append(v)
        return self._finish(np.concatenate(found), np.concatenate(values))


class CannyEdges:
    """``skimage.feature.canny(g, sigma)`` (default thresholds 0.1 and 0.2, no mask) on
    reconstructions of one original."""

    LOW = 0.1  # canny's default low threshold on a float image

    def __init__(self, original: np.ndarray, *, sigma: float):
        original = np.asarray(original)
        if original.ndim != 2 or original.dtype != np.float32:
            raise ValueError(f"CannyEdges needs a 2-D float32 image, not {original.dtype} {original.shape}")
        self.original, self.sigma = original, float(sigma)
        self.radius = _gauss_radius(self.sigma)
        # Hysteresis joins edge pixels into chains: the crop keeps, around its core, a ring
        # computed exactly (so non-edge: it lies in tiles that cannot fire) between the core
        # and the band that the crop's own borders disturb.
        self.margin = self.radius + 6
        self.margin_tiles_ok = self.margin <= TILE  # the ring must lie in tiles next to the core
        gi = l1_gain(lambda d: ndi.sobel(ndi.gaussian_filter(d, self.sigma, mode="constant"), axis=0), self.radius + 1)
        gj = l1_gain(lambda d: ndi.sobel(ndi.gaussian_filter(d, self.sigma, mode="constant"), axis=1), self.radius + 1)
        # near the image's edges canny's smoothing renormalises its weights: a weighted mean,
        # whose Sobel response is at most the Sobel kernel's L1 norm (8 per axis) times |e|
        self.gain_inner, self.gain_edge = math.hypot(gi, gj), math.hypot(8.0, 8.0)
        self.tiles = tile_max(self._magnitude(original))
        self.gain = np.where(np.logical_and.outer(*(_inner_tiles(n, self.radius + 2) for n in original.shape)),
                             self.gain_inner, self.gain_edge)
        self.edges = self._full(original)

    def _magnitude(self, g):
        # canny's own steps (skimage.feature._canny): smoothing with bleed-over correction
        # under mode='constant', then Sobel; only needed here as an upper bound
        from skimage.filters import gaussian

        kw = dict(sigma=self.sigma, mode="constant", cval=0.0, preserve_range=False)
        bleed = gaussian(np.ones(g.shape, g.dtype), **kw) + np.finfo(g.dtype).eps
        smoothed = gaussian(g, **kw) / bleed
        return np.hypot(ndi.sobel(smoothed, axis=0), ndi.sobel(smoothed, axis=1))

    def _full(self, g):
        from skimage.feature import canny

        return canny(g, sigma=self.sigma)

    def candidates(self, g: np.ndarray) -> np.ndarray:
        """Tiles where ``g``'s gradient magnitude can reach the low threshold."""
        err = _reach_max(tile_max(np.abs(g - self.original), fill=0.0), self.radius + 1)
        return self.tiles + self.gain * (1 + SLACK) * err >= self.LOW * (1 - SLACK) - ABS_SLACK

    def detect(self, g: np.ndarray) -> np.ndarray:
        """``canny(g, sigma)``'s edge map, recomputed only where it can change."""
        g = np.asarray(g)
        if g.shape != self.original.shape or g.dtype != np.float32:
            raise ValueError(f"expected a float32 image of shape {self.original.shape}, not {g.dtype} {g.shape}")
        if not self.margin_tiles_ok:
            return self._full(g)
        cand = self.candidates(g)
        if cand.mean() > FULL_FRACTION:
            return self._full(g)
        crops = list(_crops(cand, g.shape, self.margin))
        if sum(core.size for _, core in crops) > FULL_FRACTION * g.size:
            return self._full(g)
        out = np.zeros(g.shape, bool)
        for (sy, sx), core in crops:
            edges = self._full(np.ascontiguousarray(g[sy, sx]))
            out[sy, sx] |= edges & core
        return out
