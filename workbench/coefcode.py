"""Context-adaptive entropy coding of quantised coefficient grids.

A grid is an int64 array (rows, cols, K): K coefficients for each patch. Coding is done by
constriction's range coder with categorical models whose counts adapt as coding proceeds,
identically in the encoder and the decoder (no probability tables are transmitted).

Symbols
    magnitude token ``t = |q|`` for ``|q| < 16``; above that ``t = 11 + bitlength(|q|)`` followed
    by ``bitlength - 1`` raw mantissa bits (the leading one is implied). Signs are raw bits.
First coefficient (k = 0)
    replaced by the residual of the planar predictor ``L + T - TL`` over the patch grid,
    coded row by row with a context from the residuals of the row above.
Extent
    for each patch, the index of its last non-zero coefficient (0 when only the first is
    non-zero), coded row by row with a context from the extents of the row above; nothing
    past it is coded, which is where most of the speed at useful rates comes from.
Other coefficients (k >= 1, up to the extent)
    coded component by component within bands of rows whose height doubles
    (1, 1, 2, 4, 8, ... rows) so the models adapt early; context = coefficient group of k x
    local activity (the patch's own two previous coefficients and its left, right and upper
    neighbours' previous coefficient) x whether k is the patch's last coefficient (which is
    then known to be non-zero).

Every count is an integer and every model is built from those integers, so a decoder on
any machine rebuilds bit for bit the models the encoder used.
"""

from __future__ import annotations

import struct

import constriction
import numpy as np

from .errors import BundleError

DIRECT = 16
MAX_BITS = 40
ALPHABET = DIRECT + MAX_BITS - 4  # tokens for bit lengths 5..MAX_BITS
INCREMENT = 32
COUNT_LIMIT = 1 << 16
AC_EDGES = np.array([1, 2, 3, 4, 6, 8, 11, 15, 20, 28, 40])
DC_EDGES = np.array([1, 2, 3, 5, 8, 12, 18, 28, 44, 70])
K_EDGES = np.array([2, 3, 4, 6, 9, 14, 21, 32, 48, 80, 128, 256, 512])
N_AC_CLASSES = len(AC_EDGES) + 1
N_DC_CLASSES = len(DC_EDGES) + 2  # the last class is the first row
EXT_EDGES = np.array([1, 2, 4, 6, 9, 13, 18, 25, 35, 50, 70, 100])
N_EXT_CLASSES = len(EXT_EDGES) + 2
N_GROUPS = len(K_EDGES) + 1
_FAMILY = constriction.stream.model.Categorical(perfect=False)


def _tokens(mag: np.ndarray):
    """Token, number of mantissa bits and mantissa value of non-negative magnitudes."""
    bitlen = np.frexp(mag.astype(np.float64))[1].astype(np.int64)
    esc = mag >= DIRECT
    tok = np.where(esc, DIRECT - 5 + bitlen, mag)
    nbits = np.where(esc, bitlen - 1, 0)
    return tok, nbits


class _Models:
    """Adaptive count tables, one row of ALPHABET counts per context."""

    def __init__(self, n_contexts: int):
        self.counts = np.ones((n_contexts, ALPHABET), dtype=np.int64)
        # A mild prior towards small magnitudes speeds up the first rows.
        self.counts[:, :4] += np.array([24, 8, 4, 2])

    def probabilities(self, ctx: np.ndarray) -> np.ndarray:
        return self.counts[ctx].astype(np.float64)

    def update(self, ctx: np.ndarray, tok: np.ndarray) -> None:
        n = self.counts.shape[0]
        hist = np.bincount(ctx * ALPHABET + tok, minlength=n * ALPHABET).reshape(n, ALPHABET)
        self.counts += INCREMENT * hist
        over = self.counts.sum(axis=1) > COUNT_LIMIT
        if over.any():
            self.counts[over] = (self.counts[over] + 1) // 2


def _bands(rows: int) -> list[tuple[int, int]]:
    edges = [0]
    h = 1
    while edges[-1] < rows:
        edges.append(min(rows, edges[-1] + h))
        if len(edges) > 2:
            h *= 2
    return list(zip(edges[:-1], edges[1:]))


def _k_group(k: int) -> int:
    return int(np.searchsorted(K_EDGES, k, side="right"))


def _dc_residual(q0: np.ndarray) -> np.ndarray:
    return np.diff(np.diff(q0, axis=0, prepend=0), axis=1, prepend=0)


def _dc_from_residual(res: np.ndarray) -> np.ndarray:
    return np.cumsum(np.cumsum(res, axis=0), axis=1)


def _row_context(prev_row: np.ndarray | None, cols: int, edges: np.ndarray) -> np.ndarray:
    """Context of a row of symbols from the magnitudes in the row above (TL + 2T + TR)."""
    if prev_row is None:
        return np.full(cols, len(edges) + 1, dtype=np.int64)
    p = np.pad(np.abs(prev_row), 1)
    return np.searchsorted(edges, p[:-2] + 2 * p[1:-1] + p[2:], side="right")


def _extent(q: np.ndarray) -> np.ndarray:
    """Index of the last non-zero coefficient of each patch among k >= 1 (0 if none)."""
    if q.shape[2] < 2:
        return np.zeros(q.shape[:2], np.int64)
    nz = q[:, :, 1:] != 0
    last = q.shape[2] - 1 - np.argmax(nz[:, :, ::-1], axis=2)
    return np.where(nz.any(axis=2), last, 0)


def _ac_context(mag: np.ndarray, ext: np.ndarray, r0: int, r1: int, k: int, active: np.ndarray) -> np.ndarray:
    """Context of component k for the active patches of rows r0:r1, from coded values only.

    ``mag`` is laid out (K, rows, cols) so that one component is contiguous.
    """
    prev = mag[k - 1, r0:r1]
    act = 2 * prev
    if k >= 2:
        act += mag[k - 2, r0:r1]
    act[:, 1:] += prev[:, :-1]
    act[:, :-1] += prev[:, 1:]
    if r0 > 0:
        act += mag[k - 1, r0 - 1 : r1 - 1]
    else:
        act[1:] += prev[:-1]
    cls = np.searchsorted(AC_EDGES, act[active], side="right")
    last = ext[r0:r1][active] == k
    return (_k_group(k) * N_AC_CLASSES + cls) * 2 + last


class _Writer:
    def __init__(self):
        self.enc = constriction.stream.queue.RangeEncoder()
        self.raw: list[np.ndarray] = []

    def put(self, models: _Models, ctx: np.ndarray, values: np.ndarray, signed: bool = True) -> None:
        ctx = ctx.reshape(-1)
        values = values.reshape(-1)
        mag = np.abs(values)
        tok, nbits = _tokens(mag)
        if tok.size:
            self.enc.encode(tok.astype(np.int32), _FAMILY, models.probabilities(ctx))
        models.update(ctx, tok)
        if signed:
            self.raw.append((values[mag > 0] < 0).astype(np.uint8))
        self._mantissas(nbits, mag)

    def put_fixed(self, probs: np.ndarray, values: np.ndarray) -> None:
        """Signed values under one fixed token distribution (for learned models)."""
        values = values.reshape(-1)
        mag = np.abs(values)
        tok, nbits = _tokens(mag)
        if tok.size:
            self.enc.encode(tok.astype(np.int32), constriction.stream.model.Categorical(probs, perfect=False))
        self.raw.append((values[mag > 0] < 0).astype(np.uint8))
        self._mantissas(nbits, mag)

    def _mantissas(self, nbits, mag):
        esc = nbits > 0
        if esc.any():
            nb, m = nbits[esc], mag[esc]
            pos = np.arange(nb.sum()) - np.repeat(np.cumsum(nb) - nb, nb)
            shift = np.repeat(nb, nb) - 1 - pos
            self.raw.append(((np.repeat(m, nb) >> shift) & 1).astype(np.uint8))

    def finish(self) -> bytes:
        words = self.enc.get_compressed().astype("<u4")
        bits = np.concatenate(self.raw) if self.raw else np.zeros(0, np.uint8)
        return struct.pack("<II", words.size, bits.size) + words.tobytes() + np.packbits(bits).tobytes()


class _Reader:
    def __init__(self, data: bytes):
        if len(data) < 8:
            raise BundleError("coefficient stream is truncated")
        n_words, n_bits = struct.unpack("<II", data[:8])
        end = 8 + 4 * n_words
        if end + (n_bits + 7) // 8 > len(data):
            raise BundleError("coefficient stream is shorter than its header says")
        words = np.frombuffer(data[8:end], dtype="<u4").astype(np.uint32)
        self.bits = np.unpackbits(np.frombuffer(data[end:], np.uint8))[:n_bits]
        self.pos = 0
        try:
            self.dec = constriction.stream.queue.RangeDecoder(words)
        except Exception as exc:  # constriction reports malformed input in several ways
            raise BundleError(f"coefficient stream is not decodable ({exc})") from None

    def _take(self, n: int) -> np.ndarray:
        if self.pos + n > self.bits.size:
            raise BundleError("coefficient stream ran out of raw bits")
        out = self.bits[self.pos : self.pos + n]
        self.pos += n
        return out

    def get(self, models: _Models, ctx: np.ndarray, signed: bool = True) -> np.ndarray:
        ctx = ctx.reshape(-1)
        if ctx.size == 0:
            return np.zeros(0, np.int64)
        try:
            tok = np.asarray(self.dec.decode(_FAMILY, models.probabilities(ctx)), dtype=np.int64)
        except Exception as exc:
            raise BundleError(f"coefficient stream is not decodable ({exc})") from None
        models.update(ctx, tok)
        return self._values(tok, signed)

    def get_fixed(self, probs: np.ndarray, n: int) -> np.ndarray:
        """Inverse of :meth:`_Writer.put_fixed`."""
        if n == 0:
            return np.zeros(0, np.int64)
        try:
            model = constriction.stream.model.Categorical(probs, perfect=False)
            tok = np.asarray(self.dec.decode(model, n), dtype=np.int64)
        except Exception as exc:
            raise BundleError(f"latent stream is not decodable ({exc})") from None
        return self._values(tok, True)

    def _values(self, tok: np.ndarray, signed: bool) -> np.ndarray:
        esc = tok >= DIRECT
        mag = np.where(esc, 0, tok)
        nz = tok > 0
        signs = self._take(int(nz.sum())) if signed else None  # signs precede mantissas
        if esc.any():
            nb = tok[esc] - (DIRECT - 5) - 1
            bits = self._take(int(nb.sum())).astype(np.int64)
            pos = np.arange(bits.size) - np.repeat(np.cumsum(nb) - nb, nb)
            weights = np.left_shift(1, np.repeat(nb, nb) - 1 - pos)
            starts = np.cumsum(nb) - nb
            mant = np.add.reduceat(bits * weights, starts)
            mag[esc] = (np.int64(1) << nb) + mant
        if signed:
            mag[nz] = np.where(signs == 1, -mag[nz], mag[nz])
        return mag


def laplace_token_counts(scale: float, total: int = 1 << 16) -> np.ndarray:
    """Integer token counts of a zero-mean Laplace of ``scale`` (quantiser units), rounded
    integers with a floor of one so every token stays codable."""
    b = max(scale, 1e-6)
    edges = np.concatenate([np.arange(DIRECT) + 0.5, 2.0 ** np.arange(5, MAX_BITS + 1) - 0.5])
    tail = np.exp(-edges / b)  # P(|k| > edge) for the folded Laplace
    mass = -np.diff(np.concatenate([[1.0], tail]))
    return np.maximum(1, np.round(mass * total)).astype(np.int64)


def encode_fixed(channels: list[np.ndarray], counts: list[np.ndarray]) -> bytes:
    """Each array of ``channels`` coded under its own fixed token distribution."""
    w = _Writer()
    for v, c in zip(channels, counts):
        w.put_fixed(c.astype(np.float64), np.asarray(v, dtype=np.int64))
    return w.finish()


def decode_fixed(data: bytes, sizes: list[int], counts: list[np.ndarray]) -> list[np.ndarray]:
    rd = _Reader(data)
    return [rd.get_fixed(c.astype(np.float64), n) for n, c in zip(sizes, counts)]


def _new_models():
    return (_Models(N_DC_CLASSES), _Models(N_EXT_CLASSES), _Models(N_GROUPS * N_AC_CLASSES * 2))


def encode_grids(grids: list[np.ndarray], kinds: list[int]) -> bytes:
    """Entropy-code coefficient grids.

    Parameters
    ----------
    grids : list of ndarray, int64, shape (rows, cols, K)
        Quantised coefficients; component 0 is predicted across patches.
    kinds : list of int
        Model family of each grid (0 luma/grey, 1 chroma, 2 basis vectors): grids of one
        kind share adaptive models, so Cr starts from what Cb taught them.

    Returns
    -------
    bytes
    """
    w = _Writer()
    models = {}
    for q, kind in zip(grids, kinds):
        q = np.asarray(q, dtype=np.int64)
        if q.ndim != 3:
            raise ValueError(f"coefficient grid must be 3-D, got shape {q.shape}")
        dc, em, ac = models.setdefault(kind, _new_models())
        rows, cols, K = q.shape
        res = _dc_residual(q[:, :, 0])
        ext = _extent(q)
        for r in range(rows):
            prev = r - 1 if r else None
            w.put(dc, _row_context(None if prev is None else res[prev], cols, DC_EDGES), res[r])
            w.put(em, _row_context(None if prev is None else ext[prev], cols, EXT_EDGES), ext[r], signed=False)
        qt = np.ascontiguousarray(q.transpose(2, 0, 1))
        mag = np.abs(qt)
        mag[0] = np.abs(res)
        for r0, r1 in _bands(rows):
            band_ext = ext[r0:r1]
            for k in range(1, int(band_ext.max(initial=0)) + 1):
                active = band_ext >= k
                w.put(ac, _ac_context(mag, ext, r0, r1, k, active), qt[k, r0:r1][active])
    return w.finish()


def decode_grids(data: bytes, shapes: list[tuple[int, int, int]], kinds: list[int]) -> list[np.ndarray]:
    """Inverse of :func:`encode_grids`; ``shapes`` and ``kinds`` come from the bundle metadata."""
    rd = _Reader(data)
    models = {}
    out = []
    for (rows, cols, K), kind in zip(shapes, kinds):
        dc, em, ac = models.setdefault(kind, _new_models())
        res = np.zeros((rows, cols), np.int64)
        ext = np.zeros((rows, cols), np.int64)
        for r in range(rows):
            prev = r - 1 if r else None
            res[r] = rd.get(dc, _row_context(None if prev is None else res[prev], cols, DC_EDGES))
            ext[r] = rd.get(em, _row_context(None if prev is None else ext[prev], cols, EXT_EDGES), signed=False)
        if ext.max(initial=0) >= K:
            raise BundleError(f"coefficient stream claims more than {K} components")
        qt = np.zeros((K, rows, cols), np.int64)
        qt[0] = _dc_from_residual(res)
        mag = np.zeros((K, rows, cols), np.int64)
        mag[0] = np.abs(res)
        for r0, r1 in _bands(rows):
            band_ext = ext[r0:r1]
            for k in range(1, int(band_ext.max(initial=0)) + 1):
                active = band_ext >= k
                v = rd.get(ac, _ac_context(mag, ext, r0, r1, k, active))
                qt[k, r0:r1][active] = v
                mag[k, r0:r1][active] = np.abs(v)
        out.append(np.ascontiguousarray(qt.transpose(1, 2, 0)))
    return out
