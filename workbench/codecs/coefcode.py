"""Context-adaptive entropy coding of quantised coefficient grids.

A grid is an int64 array (rows, cols, K): K coefficients for each patch. Coding is done by
an entropy coder (:mod:`workbench.codecs.ans`; constriction's range coder in older files) with
categorical models whose counts adapt as coding proceeds,
identically in the encoder and the decoder (no probability tables are transmitted).
The grids of one image (Y, Cb, Cr) are coded in lockstep so that one call to the coder
serves all of them: a call costs about the same Python overhead whether it carries a
hundred symbols or a hundred thousand, so the number of calls is what sets the speed.

Symbols
    magnitude tokens, raw sign and mantissa bits, as :mod:`workbench.codecs.symbols` codes them.
First coefficient (k = 0) and extent
    the first coefficient is replaced by the residual of the planar predictor ``L + T - TL``
    over the patch grid; the extent of a patch is the index of its last non-zero coefficient
    (0 when only the first is non-zero), and nothing past it is coded. Both are coded for
    row 0, then for the rows halfway between coded rows, level by level (row P/2; P/4 and
    3P/4; ... for P the power of two at or above the row count), with a context from the
    coded rows above and below; a level is one coder call, or calls of CHUNK rows.
Other coefficients (k >= 1, up to the extent)
    coded in bands of rows whose height doubles (1, 1, 2, 4, 8, ... rows) so the models adapt
    early. The first LOW components are coded one at a time, with context = coefficient group
    of k x local activity (the patch's own two previous coefficients and its left, right and
    upper neighbours' previous coefficient) x whether k is the patch's last coefficient.
    The rest of a band goes in one call, with context = group of k x the patch's own
    activity at components LOW-1 and LOW x the distance from k to the extent (zero means the
    coefficient is the last one and known to be non-zero). The bands advance as a wavefront
    (band i's component k beside band i+1's component k-1), which changes no context.

Every count is an integer and every model is built from those integers, so a decoder on
any machine rebuilds bit for bit the models the encoder used.
"""

from __future__ import annotations

import numpy as np

from ..errors import BundleError
from .symbols import ALPHABET, COUNT_LIMIT, INCREMENT, MAX_BITS, Reader, Writer, check_magnitudes  # noqa: F401 (MAX_BITS: part of this module's interface)

LOW = 8
CHUNK = 32  # pass-1 rows per coder call at most: big images' models adapt within a level
AC_EDGES = np.array([1, 2, 3, 4, 6, 8, 11, 15, 20, 28, 40])
DC_EDGES = np.array([1, 2, 3, 5, 8, 12, 18, 28, 44, 70])
EXT_EDGES = np.array([1, 2, 4, 6, 9, 13, 18, 25, 35, 50, 70, 100])
K_EDGES = np.array([2, 3, 4, 6, 9, 14, 21, 32, 48, 80, 128, 256, 512])
TAIL_OWN_EDGES = np.array([1, 2, 4, 8])
TAIL_GAP_EDGES = np.array([1, 2, 4, 8, 16])
N_AC_CLASSES = len(AC_EDGES) + 1
N_DC_CLASSES = len(DC_EDGES) + 2  # the last class is the first row
N_EXT_CLASSES = len(EXT_EDGES) + 2
N_GROUPS = len(K_EDGES) + 1
N_OWN = len(TAIL_OWN_EDGES) + 1
N_GAP = len(TAIL_GAP_EDGES) + 1
FAMILIES = (("dc", N_DC_CLASSES), ("ext", N_EXT_CLASSES), ("low", N_GROUPS * N_AC_CLASSES * 2),
            ("tail", N_GROUPS * N_OWN * N_GAP))
# Every context starts from the same prior: most coefficients are zero or small, and a
# starting point near that saves each fresh context from learning it symbol by symbol.
PRIOR = np.array([64, 32, 16, 8, 4, 2])
SPLIT = 8  # tokens from here on are coded in a second stage (see _Models)
INT_CODER = True  # what this version writes: tokens through ans.py (False: constriction's range coder)
_AC_CLASS = np.searchsorted(AC_EDGES, np.arange(AC_EDGES[-1] + 1), side="right").astype(np.int32)


def _classifier(edges: np.ndarray):
    """``f(v)`` = ``np.searchsorted(edges, v, side="right")`` for integers ``v >= 0``, by table
    lookup: a binary search per value cost the decoder a tenth of its time at 4 MP."""
    table = np.searchsorted(edges, np.arange(edges[-1] + 1), side="right").astype(np.int64)
    top = int(edges[-1])
    return lambda v: table.take(np.minimum(v, top))


_dc_class, _ext_class, _k_group = (_classifier(e) for e in (DC_EDGES, EXT_EDGES, K_EDGES))
_own_class, _gap_class = _classifier(TAIL_OWN_EDGES), _classifier(TAIL_GAP_EDGES)


class _Models:
    """Adaptive count tables for every context family of every grid kind in one stream.

    With ``split`` a token is coded in two stages: ``min(token, split)`` under a table of
    ``split + 1`` entries, then, for tokens at or above ``split``, ``token - split`` under a
    second table of the same context. Most tokens are small, and the coder's work per
    symbol grows with the size of its table (1.7x faster at 9 entries than at 38, measured
    with constriction). Without ``split`` (streams of format 4 and before) one table holds
    every token.
    """

    def __init__(self, kinds, split: int | None = SPLIT):
        self.offset = {}
        n = 0
        for family, size in FAMILIES:  # family-major, so one call touches one contiguous slice
            for kind in sorted(set(kinds)):
                self.offset[kind, family] = n
                n += size
        self.split = split
        width = ALPHABET if split is None else split + 1
        self.counts = np.ones((n, width), dtype=np.int64)
        self.counts[:, :PRIOR.size] = PRIOR
        if split is not None:
            self.counts[:, split] = ALPHABET - split  # the escape starts as the tokens it stands for
            self.tail = np.ones((n, ALPHABET - split), dtype=np.int64)
            self._tail_probs = self.tail.astype(np.float32)
        self._probs = self.counts.astype(np.float32)

    def probabilities(self, ctx: np.ndarray) -> np.ndarray:
        return self._probs.take(ctx, axis=0)  # 7x faster than fancy indexing for (N, 9) rows

    def tail_probabilities(self, ctx: np.ndarray) -> np.ndarray:
        return self._tail_probs.take(ctx, axis=0)

    def update(self, ctx: np.ndarray, tok: np.ndarray) -> None:
        if self.split is None:
            add_counts(self.counts, self._probs, ctx, tok)
            return
        add_counts(self.counts, self._probs, ctx, np.minimum(tok, self.split))
        big = tok >= self.split
        if big.any():
            add_counts(self.tail, self._tail_probs, ctx[big], tok[big] - self.split)


def add_counts(counts: np.ndarray, probs: np.ndarray, ctx: np.ndarray, tok: np.ndarray) -> None:
    """Count ``tok`` under ``ctx``, halving rows past COUNT_LIMIT; ``probs`` mirrors ``counts``."""
    # Only the rows between the smallest and largest context are touched: each call
    # draws on one or two families, a small slice of the table.
    width = counts.shape[1]
    lo, hi = int(ctx.min()), int(ctx.max()) + 1
    rows = counts[lo:hi]
    rows += INCREMENT * np.bincount((ctx - lo) * width + tok, minlength=(hi - lo) * width).reshape(-1, width)
    over = rows.sum(axis=1) > COUNT_LIMIT
    while over.any():  # one call may add many symbols; halve until every row is back in range
        rows[over] = (rows[over] + 1) // 2
        over = rows.sum(axis=1) > COUNT_LIMIT
    probs[lo:hi] = rows  # exact in float32: every count is below 2**17


def _bands(rows: int) -> list[tuple[int, int]]:
    edges = [0]
    h = 1
    while edges[-1] < rows:
        edges.append(min(rows, edges[-1] + h))
        if len(edges) > 2:
            h *= 2
    return list(zip(edges[:-1], edges[1:]))


def _dc_residual(q0: np.ndarray) -> np.ndarray:
    return np.diff(np.diff(q0, axis=0, prepend=0), axis=1, prepend=0)


def _dc_from_residual(res: np.ndarray) -> np.ndarray:
    return np.cumsum(np.cumsum(res, axis=0), axis=1)


def line_sum(a: np.ndarray) -> np.ndarray:
    """TL + 2T + TR along the last axis of magnitudes ``a`` (edges replicated)."""
    s = 2 * a
    s[..., 1:] += a[..., :-1]
    s[..., :-1] += a[..., 1:]
    s[..., 0] += a[..., 0]
    s[..., -1] += a[..., -1]
    return s


def _row_phases(grids):
    """Pass-1 phases: lists of (grid, rows, d). Row 0 of every grid comes first (d = 0); then,
    for d = P/2, P/4, ... 1 (P the power of two at or above the most rows), the rows halfway
    between rows already coded, ``d, 3d, 5d, ...``, with a context from the coded rows d above
    and d below. A level holds about as many rows as all before it, so the models adapt
    between calls whose sizes double, and the whole pass takes about log2(P) + 1 calls (levels
    of more than CHUNK rows are split)."""
    top = max(g.rows for g in grids)
    phases = [[(g, np.array([0]), 0) for g in grids]]
    d = 1 << max(top - 1, 0).bit_length()
    while d > 1:
        d //= 2
        rows = {id(g): np.arange(d, g.rows, 2 * d) for g in grids}
        n = max(r.size for r in rows.values())
        for c0 in range(0, n, CHUNK):
            part = [(g, rows[id(g)][c0:c0 + CHUNK], d) for g in grids if rows[id(g)][c0:c0 + CHUNK].size]
            if part:
                phases.append(part)
    return phases


def _code_rows(phase, models: _Models, io) -> None:
    """First coefficients and extents of the rows of one pass-1 phase, in one coder call."""
    dc, ex, shapes = [], [], []
    for g, rows, d in phase:
        if d == 0:
            c_dc, c_ext = np.array([[N_DC_CLASSES - 1]]), np.array([[N_EXT_CLASSES - 1]])
        else:
            below = np.where(rows + d < g.rows, rows + d, rows - d)
            s = line_sum(np.abs(np.stack([g.res[rows - d], g.ext[rows - d]]))) + line_sum(
                np.abs(np.stack([g.res[below], g.ext[below]])))
            c_dc = _dc_class((s[0] + 1) // 2)
            c_ext = _ext_class((s[1] + 1) // 2)
        shape = (rows.size, g.cols)
        dc.append(np.broadcast_to(c_dc + g.off["dc"], shape).reshape(-1))
        ex.append(np.broadcast_to(c_ext + g.off["ext"], shape).reshape(-1))
        shapes.append(shape)
    sizes = [c.size for c in dc + ex]
    v = io.code(models, np.concatenate(dc + ex),
                lambda: np.concatenate([g.res[rows].reshape(-1) for g, rows, _ in phase]
                                       + [g.ext[rows].reshape(-1) for g, rows, _ in phase]), sum(sizes[: len(phase)]))
    if io.decoding:
        chunks = _split(v, sizes)
        for (g, rows, _), shape, d_, e_ in zip(phase, shapes, chunks[: len(phase)], chunks[len(phase):]):
            e_ = e_.reshape(shape)
            if e_.max(initial=0) >= g.K:
                raise BundleError(f"coefficient stream claims more than {g.K} components")
            g.res[rows] = d_.reshape(shape)
            g.ext[rows] = e_
            g.mag[0, rows] = np.abs(g.res[rows])


def last_true(mask: np.ndarray) -> np.ndarray:
    """Index along axis 0 of the last True of ``mask`` (K, ...), 0 where there is none.

    A maximum of ``mask * index`` over the rows: numpy's argmax along axis 0 copies the
    array to reduce along its last axis, 8x slower at K = 64 (measured on a 4-MP plane)."""
    idx = np.arange(mask.shape[0], dtype=np.uint16 if mask.shape[0] <= 65535 else np.uint32)
    return np.max(mask * idx.reshape((-1,) + (1,) * (mask.ndim - 1)), axis=0).astype(np.intp)


def _extent(qk: np.ndarray) -> np.ndarray:
    """Index of the last non-zero coefficient of each patch among k >= 1 (0 if none), from
    a component-major grid (K, rows, cols)."""
    return last_true(qk != 0).astype(np.int64)


# (group of k x activity class) x 2 for k = 0..LOW, indexed by the clipped activity
_LOW_TABLE = [((int(_k_group(k)) * N_AC_CLASSES + _AC_CLASS) * 2).astype(np.int32) for k in range(LOW + 1)]


def _low_context(mag: np.ndarray, ext: np.ndarray, r0: int, r1: int, k: int, active: np.ndarray) -> np.ndarray:
    """Context of component k (1 <= k <= LOW) for the active patches of rows r0:r1.

    ``mag`` is laid out (LOW + 1, rows, cols) so that one component is contiguous.
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
    # class by table lookup (activities past the last edge share the top class), and the
    # table already holds k's group: two operations on the active patches only
    ctx = _LOW_TABLE[k][np.minimum(act[active], _AC_CLASS.size - 1)]
    ctx += ext[r0:r1][active] == k
    return ctx


def _tail_positions(ext: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Patch index (into ``ext.ravel()``) and component of every coefficient past LOW and up
    to its patch's extent, patch by patch, components ascending."""
    e = ext.reshape(-1)
    n = np.maximum(e - LOW, 0)
    idx = np.repeat(np.arange(e.size), n)
    k = LOW + 1 + np.arange(idx.size) - np.repeat(np.cumsum(n) - n, n)
    return idx, k


def _class_table(edges: np.ndarray) -> np.ndarray:
    return np.searchsorted(edges, np.arange(edges[-1] + 1), side="right").astype(np.int64)


_TAIL_TABLES = tuple(_class_table(e) for e in (K_EDGES, TAIL_OWN_EDGES, TAIL_GAP_EDGES))


def _tail_context(own: np.ndarray, ext: np.ndarray, idx: np.ndarray, k: np.ndarray) -> np.ndarray:
    """Context of the tail coefficients at (``idx``, ``k``) from the patch's own activity at
    components LOW-1 and LOW (``own``) and the distance to its extent:
    ``(group(k) * N_OWN + own class) * N_GAP + gap class``, each class by table lookup
    (compiled: the array version's five passes cost 20 ms at 4 MP and 2 bpp)."""
    from . import compiled

    out = np.empty(idx.size, np.int64)
    compiled.tail_context(np.ascontiguousarray(own).reshape(-1), np.ascontiguousarray(ext).reshape(-1), idx, k,
                          *_TAIL_TABLES, N_OWN, N_GAP, out)
    return out


class _Grid:
    """Coding state of one grid: what both sides know once a symbol has been coded."""

    def __init__(self, shape, kind, models: _Models, q: np.ndarray | None = None):
        self.rows, self.cols, self.K = shape
        self.off = {family: models.offset[kind, family] for family, _ in FAMILIES}
        self.bands = _bands(self.rows)
        # Held component-major, (K, rows, cols), so that one component is contiguous; int32
        # holds every value the coder can carry (MAX_BITS < 31) in half the memory.
        if q is None:
            self.q = np.zeros((self.K, self.rows, self.cols), np.int32)
            self.res = np.zeros(shape[:2], np.int64)
            self.ext = np.zeros(shape[:2], np.int64)
            self.mag = np.zeros((LOW + 1,) + shape[:2], np.int32)
        else:
            if q.dtype.itemsize > 4:
                check_magnitudes(q)
            self.q = np.ascontiguousarray(np.moveaxis(q, -1, 0), dtype=np.int32)
            self.res = _dc_residual(self.q[0].astype(np.int64))
            self.ext = _extent(self.q)
            self.mag = np.zeros((LOW + 1,) + shape[:2], np.int32)
            self.mag[0] = np.abs(self.res)
            top = min(LOW, self.K - 1)
            self.mag[1 : top + 1] = np.abs(self.q[1 : top + 1])


class _Encoding:
    decoding = False

    def __init__(self, writer: Writer):
        self.w = writer

    def code(self, models, ctx, values, n_signed=None):
        v = values()
        self.w.put(models, ctx, v, n_signed)
        return v


class _Decoding:
    decoding = True

    def __init__(self, reader: Reader):
        self.r = reader

    def code(self, models, ctx, values, n_signed=None):
        return self.r.get(models, ctx, n_signed)


def _split(v: np.ndarray, sizes: list[int]) -> list[np.ndarray]:
    return np.split(v, np.cumsum(sizes)[:-1]) if sizes else []


def _traverse(grids: list[_Grid], models: _Models, io) -> None:
    """Visit every symbol of ``grids`` in coding order; the decoder fills the grids in."""
    for phase in _row_phases(grids):
        _code_rows(phase, models, io)
    if io.decoding:
        for g in grids:
            g.q[0] = _dc_from_residual(g.res)
    # Component k of band i needs component k-1 of its own patches and of the row above
    # (the last row of band i-1), nothing more: so the bands run as a wavefront, call t
    # carrying component t-i+1 of every band i (and the rest of band i once its first LOW
    # components are known). The contexts are those of a band-by-band order, in far fewer
    # coder calls.
    for t in range(max(len(g.bands) for g in grids) + LOW):
        low, tail = [], []
        for g in grids:
            for i, (r0, r1) in enumerate(g.bands):
                k = t - i + 1
                if 1 <= k <= min(LOW, g.K - 1):
                    a = g.ext[r0:r1] >= k
                    if a.any():
                        low.append((g, r0, r1, k, a))
                elif k == LOW + 1 and g.K > LOW + 1:
                    tail.append((g, r0, r1) + _tail_positions(g.ext[r0:r1]))
        if not low and not tail:
            continue
        ctx = [g.off["low"] + _low_context(g.mag, g.ext, r0, r1, k, a) for g, r0, r1, k, a in low]
        ctx += [g.off["tail"] + _tail_context(g.mag[LOW, r0:r1] + g.mag[LOW - 1, r0:r1], g.ext[r0:r1], idx, kk)
                for g, r0, r1, idx, kk in tail]
        v = io.code(models, np.concatenate(ctx), lambda: np.concatenate(
            [g.q[k, r0:r1][a] for g, r0, r1, k, a in low]
            + [g.q[:, r0:r1].reshape(g.K, -1)[kk, idx] for g, r0, r1, idx, kk in tail]))
        if io.decoding:
            parts = _split(v, [c.size for c in ctx])
            for (g, r0, r1, k, a), vk in zip(low, parts):
                g.q[k, r0:r1][a] = vk
                np.abs(g.q[k, r0:r1], out=g.mag[k, r0:r1])  # inactive patches hold zeros
            from . import compiled

            for (g, r0, r1, idx, kk), vt in zip(tail, parts[len(low):]):
                compiled.scatter(g.q[:, r0:r1].reshape(g.K, -1), kk, idx, vt)  # a view: filled in place


def _check_kinds(shapes, kinds):
    if len(shapes) != len(kinds) or not shapes:
        raise ValueError(f"need one kind per grid, got {len(kinds)} kinds for {len(shapes)} grids")


def encode_grids(grids: list[np.ndarray], kinds: list[int], split: int | None = SPLIT,
                 int_coder: bool | None = None) -> bytes:
    """Entropy-code coefficient grids.

    Parameters
    ----------
    grids : list of ndarray, int64, shape (rows, cols, K)
        Quantised coefficients; component 0 is predicted across patches.
    kinds : list of int
        Model family of each grid (0 luma/grey, 1 chroma, 2 basis vectors): grids of one
        kind share adaptive models, so Cr learns from what Cb taught them.
    split : int or None
        Tokens from here on are coded in a second stage (:class:`_Models`); None for the
        one-stage streams of older files.
    int_coder : bool or None
        Tokens through :mod:`workbench.codecs.ans`, or through constriction's range
        coder (older files); None: :data:`INT_CODER`, what this version writes.

    Returns
    -------
    bytes
    """
    qs = [np.asarray(q) for q in grids]
    for q in qs:
        if q.dtype.kind not in "iu":
            raise ValueError(f"coefficient grid must hold integers, got {q.dtype}")
        if q.ndim != 3 or q.shape[2] < 1:
            raise ValueError(f"coefficient grid must be 3-D with at least one component, got shape {q.shape}")
    _check_kinds(qs, kinds)
    models = _Models(kinds, split)
    w = Writer(INT_CODER if int_coder is None else int_coder, sum(q.size for q in qs))
    _traverse([_Grid(q.shape, kind, models, q) for q, kind in zip(qs, kinds)], models, _Encoding(w))
    return w.finish()


def decode_grids(data: bytes, shapes: list[tuple[int, int, int]], kinds: list[int],
                 split: int | None = SPLIT, int_coder: bool = True) -> list[np.ndarray]:
    """Inverse of :func:`encode_grids`; ``shapes`` and ``kinds`` come from the bundle metadata,
    ``split`` and ``int_coder`` from the payload."""
    _check_kinds(shapes, kinds)
    models = _Models(kinds, split)
    grids = [_Grid(tuple(s), kind, models) for s, kind in zip(shapes, kinds)]
    _traverse(grids, models, _Decoding(Reader(data, int_coder)))
    return [np.moveaxis(g.q, 0, -1) for g in grids]  # (rows, cols, K) views
