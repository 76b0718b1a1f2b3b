"""A mean-scale hyperprior for the conv encoder's latents, with an integer synthesis.

The hyper-analysis maps the latents ``y`` to a small side latent ``z`` at a quarter of the
latent grid; ``z`` is coded with a per-channel factorized Laplace model; the hyper-synthesis
maps ``z`` back to a mean and a log2 scale for every latent element, and each latent is coded
under a Laplace of that scale around that mean (Ballé, Minnen, Singh, Hwang & Johnston,
"Variational image compression with a scale hyperprior", ICLR 2018; the mean: Minnen,
Ballé & Toderici, "Joint autoregressive and hierarchical priors for learned image
compression", NeurIPS 2018).

A decoder must rebuild exactly the distributions the encoder used, or the whole stream
after the first disagreement is lost. The hyper-synthesis therefore runs as an integer
network (Ballé, Johnston & Minnen, "Integer networks for data compression with
latent-variable models", ICLR 2019): weights rounded to integers with a power-of-two scale,
activations floored to integers, every product and sum an integer far below 2**53, so the
float64 matrix products that evaluate it are exact whatever order the BLAS library adds in.
Its outputs are a mean in 1/16 latent units and a log2 scale in 1/8 octaves, both
integers; the coder turns them into a table index and a whole-step mean offset with
integer arithmetic only (:func:`table_and_offset`).

Training uses the float network of the same shape (``conv_model.Hyper``); :func:`int_synthesis`
evaluates the integer one from the same float32 weights (rounding a float32 times a power of
two is exact IEEE arithmetic, so every machine derives the same integers).
"""

from __future__ import annotations

import numpy as np

DOWN = 4  # z lives on a grid 4x coarser than the latents
MEAN_FRAC = 4  # the mean comes out in 1/16 latent units
LOG_FRAC = 3  # the log2 scale in 1/8 octaves (the entropy tables' spacing)
WEIGHT_BITS = 12  # integer weights lie within +-2**12
ACT_FRAC = 8  # hidden activations carry 8 fractional bits
ACT_MAX = (1 << 24) - 1  # products and sums stay below 2**53 (24 + 12 + 11 bits)
OUT_CLIP = 1 << 16
# round(2**30 * 2**(-b/8)) for b = 0..7, written out so no platform's pow() is involved.
_INV_BITS = 30
_INV_STEP = (1073741824, 984625594, 902905651, 827968132, 759250125, 696235434, 638450708, 585461881)


# ------------------------------------------------------------------ integer synthesis

def _int_weights(w: np.ndarray, b: np.ndarray, in_frac: int):
    """Integer weights and bias of one layer and the weights' fractional bits."""
    w = np.asarray(w, np.float32)
    peak = float(np.max(np.abs(w))) if w.size else 0.0
    # frexp is exact: peak = m * 2**e with 0.5 <= m < 1, so |w| * 2**(bits - e) <= 2**bits.
    e = int(np.frexp(np.float32(peak))[1]) if peak > 0 else 0
    frac = WEIGHT_BITS - e
    wi = np.round(w.astype(np.float64) * 2.0 ** frac)
    bi = np.round(np.asarray(b, np.float32).astype(np.float64) * 2.0 ** (frac + in_frac))
    return wi, bi, frac


def _conv_int(x: np.ndarray, wi: np.ndarray, bi: np.ndarray) -> np.ndarray:
    """Exact integer convolution (stride 1, zero padding k//2) of (C, H, W) float64 integers."""
    o, c, k, _ = wi.shape
    _, h, w = x.shape
    if k == 1:
        cols = x.reshape(c, h * w).T
    else:
        p = k // 2
        xp = np.pad(x, ((0, 0), (p, p), (p, p)))
        win = np.lib.stride_tricks.sliding_window_view(xp, (k, k), axis=(1, 2))  # (C, H, W, k, k)
        cols = win.transpose(1, 2, 0, 3, 4).reshape(h * w, c * k * k)
    out = cols @ wi.reshape(o, -1).T + bi
    return out.T.reshape(o, h, w)


def _shuffle(x: np.ndarray) -> np.ndarray:
    """torch.nn.functional.pixel_shuffle with factor 2 on (4C, H, W)."""
    c4, h, w = x.shape
    c = c4 // 4
    return x.reshape(c, 2, 2, h, w).transpose(0, 3, 1, 4, 2).reshape(c, 2 * h, 2 * w)


def _requant(acc: np.ndarray, frac: int, out_frac: int, lo: float, hi: float) -> np.ndarray:
    # Division by a power of two and floor are exact on float64 integers.
    return np.clip(np.floor(acc / 2.0 ** (frac - out_frac)), lo, hi)


def int_synthesis(weights: dict, prefix: str, z: np.ndarray, latent: int) -> tuple[np.ndarray, np.ndarray]:
    """Integer hyper-synthesis of integer side latents ``z`` (S, h, w).

    Returns ``(mean16, log8)``: int32 arrays (latent, 4h, 4w), the mean in 1/16 latent units
    and the log2 scale in 1/8 octaves, the same on every machine.
    """
    x = np.asarray(z, np.float64)
    frac_in = 0
    for name in ("s1", "s2"):
        wi, bi, f = _int_weights(weights[f"{prefix}{name}.weight"], weights[f"{prefix}{name}.bias"], frac_in)
        acc = _conv_int(x, wi, bi)
        x = _shuffle(_requant(acc, f + frac_in, ACT_FRAC, 0, ACT_MAX))
        frac_in = ACT_FRAC
    wi, bi, f = _int_weights(weights[f"{prefix}s3.weight"], weights[f"{prefix}s3.bias"], frac_in)
    total = f + frac_in
    # The last layer is a 1x1 convolution: a matrix product per band of pixels, requantised
    # in place (multiplying by a power of two and flooring are exact on float64 integers).
    # Written channel-major, so that the tables and offsets made from it are contiguous.
    c, h, w = x.shape
    wm = wi.reshape(wi.shape[0], -1)
    scale = np.array([2.0 ** (MEAN_FRAC - total)] * latent + [2.0 ** (LOG_FRAC - total)] * latent)[:, None]
    out = np.empty((2 * latent, h * w), np.int32)
    flat = x.reshape(c, h * w)
    band = max(1, (1 << 21) // (2 * latent))
    for r in range(0, h * w, band):
        acc = wm @ flat[:, r:r + band]
        acc += bi[:, None]
        acc *= scale
        acc += 0.5
        np.floor(acc, out=acc)
        np.clip(acc, -OUT_CLIP, OUT_CLIP, out=acc)
        out[:, r:r + band] = acc
    out = out.reshape(2 * latent, h, w)
    return out[:latent], out[latent:]


def table_and_offset(mean16: np.ndarray, log8: np.ndarray, step_index: int, tmin: int, tmax: int):
    """Table index (clipped to ``tmin..tmax``) and whole-step mean offset at latent step
    ``2**(step_index/8)``, by integer arithmetic: the scale in steps is ``log8 - step_index``
    eighth-octaves; the mean in steps is ``mean16 / 16 * 2**(-step_index/8)`` rounded."""
    a, b = divmod(int(step_index), 8)
    table = np.clip(log8 - np.int32(step_index), tmin, tmax).astype(np.int32, copy=False)
    num = mean16.astype(np.int64)
    num *= _INV_STEP[b]  # |mean16| <= 2**16: below 2**46
    shift = MEAN_FRAC + _INV_BITS + a  # 26..42 over the step range; >> floors
    num += 1 << (shift - 1)
    num >>= shift
    return table, num



# ------------------------------------------------------------------ coding the latents

BUCKET = 2  # contexts share a table per quarter octave of predicted scale
ACTIVITY = 6  # classes of the row above's local magnitude: 0..5+
PRIOR_TOTAL = 2048  # a context starts as its predicted Laplace worth 64 symbols
SPLIT = 8  # tokens from here on are coded in a second stage, as coefcode does


class _ScaleModels:
    """Adaptive token counts, one row per (predicted-scale bucket, activity) context, each
    starting from the Laplace table of its bucket's scale (integer arithmetic only).

    The hyperprior's scales are a prediction made for the training set; counting what this
    image's latents really do under each predicted scale corrects a miscalibrated
    prediction (on a held-out photograph, a model 5 min into training: 3,945 kb under the
    fixed tables, 2,708 kb adapted) and the row above adds what the side latents, at a
    quarter of the resolution, cannot see."""

    def __init__(self, tables: np.ndarray):
        from .symbols import ALPHABET

        n_tab = tables.shape[0]
        reps = np.minimum(np.arange(-(-n_tab // BUCKET)) * BUCKET + BUCKET // 2, n_tab - 1)
        t = np.repeat(tables[reps].astype(np.int64), ACTIVITY, axis=0)
        total = t.sum(axis=1, keepdims=True)
        head = np.concatenate([t[:, :SPLIT], t[:, SPLIT:].sum(axis=1, keepdims=True)], axis=1)
        self.counts = np.maximum(1, head * PRIOR_TOTAL // total)
        tail = t[:, SPLIT:]
        self.tail = np.maximum(1, tail * 256 // np.maximum(1, tail.sum(axis=1, keepdims=True)))
        assert self.tail.shape[1] == ALPHABET - SPLIT
        self.split = SPLIT
        self._probs = self.counts.astype(np.float32)
        self._tail_probs = self.tail.astype(np.float32)

    def probabilities(self, ctx):
        return self._probs.take(ctx, axis=0)  # 7x faster than fancy indexing for (N, 9) rows

    def tail_probabilities(self, ctx):
        return self._tail_probs.take(ctx, axis=0)

    def update(self, ctx, tok):
        from .coefcode import add_counts

        add_counts(self.counts, self._probs, ctx, np.minimum(tok, SPLIT))
        big = tok >= SPLIT
        if big.any():
            add_counts(self.tail, self._tail_probs, ctx[big], tok[big] - SPLIT)


def _base_context(table: np.ndarray) -> np.ndarray:
    """The scale part of every latent's context, rows first: (h, C, w), so that each coder
    call's row is one contiguous block (the symbols' order within a row stays C, then w)."""
    base = np.asarray(table, np.int32) // BUCKET
    base *= ACTIVITY
    return np.ascontiguousarray(base.transpose(1, 0, 2))


def _row_context(base_row: np.ndarray, above: np.ndarray | None) -> np.ndarray:
    """Contexts of one latent row (C, w): its scale bucket's part (``base_row``) plus the
    activity TL + 2T + TR of the row above (already decoded) in the same channel."""
    from .coefcode import line_sum

    if above is None:
        return base_row.reshape(-1)
    act = (line_sum(np.abs(above)) + 1) // 2
    np.minimum(act, ACTIVITY - 1, out=act)
    act += base_row
    return act.reshape(-1)


def encode_latents(values: np.ndarray, table: np.ndarray, tables: np.ndarray, int_coder: bool | None = None,
                   *, offset: np.ndarray | None = None, table_min: int = 0) -> bytes:
    """Signed latent residuals ``values - offset`` (C, h, w) (the latents less their
    whole-step mean offsets; ``offset`` None for none) under adaptive models seeded by
    ``tables[table - table_min]``; one coder call per latent row, so each row is coded with
    what the rows above taught the models. ``int_coder``: tokens through
    :mod:`workbench.codecs.ans` or constriction's range coder (None: what this version
    writes, ``coefcode.INT_CODER``)."""
    from .symbols import MAX_BITS, Writer

    values = np.asarray(values)
    table = np.asarray(table)
    offset = np.broadcast_to(np.int64(0), values.shape) if offset is None else np.asarray(offset)
    if values.shape != table.shape or values.shape != offset.shape or values.ndim != 3 \
            or values.dtype.kind not in "iu" or table.dtype.kind not in "iu" or offset.dtype.kind not in "iu":
        raise ValueError(f"values {values.dtype} {values.shape}, offset {offset.dtype} {offset.shape} and table "
                         f"{table.dtype} {table.shape} must be integers of the same (C, h, w)")
    from . import compiled
    from .coefcode import INT_CODER

    # One compiled pass makes the int32 rows (as the decoder holds them) and every context:
    # the residuals, the scale buckets and the row above's activity took 0.25 s of numpy
    # at 4 MP while the residual layer was worked out on the other thread.
    c, h, wd = values.shape
    rows, ctx = np.empty((h, c, wd), np.int32), np.empty((h, c, wd), np.int32)
    big = compiled.latent_contexts(values, offset, table, int(table_min), BUCKET, ACTIVITY, rows, ctx)
    if big >= 1 << MAX_BITS:
        raise ValueError(f"latent magnitude {big} exceeds the coder's {MAX_BITS}-bit range")
    models, w = _ScaleModels(tables), Writer(INT_CODER if int_coder is None else int_coder, values.size)
    for r in range(h):
        w.put(models, ctx[r].reshape(-1), rows[r].reshape(-1))
    return w.finish()


def decode_latents(data: bytes, table: np.ndarray, tables: np.ndarray, int_coder: bool) -> np.ndarray:
    """Inverse of :func:`encode_latents` (``int_coder`` as it was coded with)."""
    from .symbols import Reader

    c, h, w = np.shape(table)
    models, rd = _ScaleModels(tables), Reader(data, int_coder)
    base = _base_context(table)
    rows = np.zeros((h, c, w), np.int32)  # decoded tokens stay below 2**26
    for r in range(h):
        rows[r] = rd.get(models, _row_context(base[r], rows[r - 1] if r else None)).reshape(c, w)
    return rows.transpose(1, 0, 2)
