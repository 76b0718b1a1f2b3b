"""The compiled loops (numba) of the entropy coder (:mod:`workbench.codecs.ans`), the context
models (:mod:`workbench.codecs.coefcode`) and the block KLT (:mod:`workbench.codecs.klt`):
loops over every symbol or pixel that numpy can only express in many passes over whole
arrays.

Imported on first use only (numba's import and its cache cost about 0.3 s). Every function
is defined at module level, so that numba's on-disk cache (beside this file, or numba's
user cache where this folder is read-only) serves every later process: functions that
referred to other compiled functions through a closure were compiled again in each one.
The first process after an install compiles them all (measured: see the README).
"""

from __future__ import annotations

import numba as nb
import numpy as np

MAX_TOTAL = 1 << 16  # the largest total a row of counts may have
_L = 1 << 23  # the rANS state's lower bound
_jit = nb.njit(cache=True, nogil=True)


# ------------------------------------------------------------------ entropy coder (ans.py)

@_jit
def ctx_range(ctx, rows):
    """(lowest, highest) context, or (0, -1) when one lies outside 0..rows-1."""
    lo, hi = rows, -1
    for i in range(ctx.size):
        c = ctx[i]
        if c < 0 or c >= rows:
            return 0, -1
        lo, hi = min(lo, c), max(hi, c)
    return lo, hi

@_jit
def cdf_of(counts, lo, hi):
    """Rows lo..hi of the cumulative table (rows, width + 1), scaled to a total of 2**16
    (the other rows are left unset: a call reads only its own contexts' rows), and
    whether every count there is at least 1 and every row's total at most MAX_TOTAL."""
    rows, width = counts.shape
    cdf = np.empty((rows, width + 1), np.int64)
    ok = True
    for c in range(lo, hi + 1):
        t = 0
        cdf[c, 0] = 0
        for k in range(width):
            v = counts[c, k]
            if v < 1:
                ok = False
            t += v
            cdf[c, k + 1] = t
        if t > MAX_TOTAL or t < 1:
            ok = False
        else:
            for k in range(1, width + 1):
                cdf[c, k] = (cdf[c, k] << 16) // t
    return cdf, ok

@_jit
def halve(table, lo, hi, limit):
    """Rows lo..hi of ``table`` halved ((c + 1) // 2) until each totals at most ``limit``."""
    width = table.shape[1]
    for c in range(lo, hi + 1):
        while True:
            total = 0
            for k in range(width):
                total += table[c, k]
            if total <= limit:
                break
            for k in range(width):
                table[c, k] = (table[c, k] + 1) // 2

@_jit
def record(start, freq, k, counts, ctx, sym, inc, limit):
    """Record ``sym[i]``'s interval under row ``counts[ctx[i]]`` at ``start/freq[k...]``;
    then, with ``inc > 0``, count them into ``counts``. Returns the new k, or -1 for a
    context, symbol or table out of range (nothing is recorded then)."""
    rows, width = counts.shape
    lo, hi = ctx_range(ctx, rows)
    if hi < lo and ctx.size:
        return -1
    cdf, ok = cdf_of(counts, lo, hi)
    if not ok:
        return -1
    for i in range(sym.size):
        if sym[i] < 0 or sym[i] >= width:
            return -1
    lo, hi = rows, -1
    for i in range(sym.size):
        c, s = ctx[i], sym[i]
        start[k] = cdf[c, s]
        freq[k] = cdf[c, s + 1] - cdf[c, s]
        k += 1
        if inc > 0:
            counts[c, s] += inc
            lo, hi = min(lo, c), max(hi, c)
    if inc > 0:
        halve(counts, lo, hi, limit)
    return k

@_jit
def put_tokens(start, freq, k, counts, tail, split, ctx, values, n_signed, raw, nraw, inc, limit,
               DIRECT, MAX_BITS):
    """What ``symbols.Writer.put`` codes, in one pass (DIRECT and MAX_BITS: its token
    scheme): each value's token (its magnitude
    below DIRECT, else DIRECT - 5 + its bit length), the tokens' first stage under
    ``counts``, the second (tokens from ``split`` on, when ``split >= 0``) under
    ``tail``, both tables counted; the signs of the non-zero values among the first
    ``n_signed`` and the mantissas (the bits below the leading one, highest first) go
    to ``raw`` from ``nraw`` on. Returns (intervals, raw bits) so far, or (-1, 0) for a
    context or count table out of range, (-2, 0) for a magnitude beyond MAX_BITS bits,
    (-3, raw bits needed) when ``raw`` is too short; nothing is coded then."""
    m = values.size
    rows = counts.shape[0]
    c_lo, c_hi = ctx_range(ctx, rows)
    if c_hi < c_lo and m:
        return -1, 0
    tok = np.empty(m, np.int64)
    need = 0
    any_big = False
    for i in range(m):
        v = np.int64(values[i])
        a = -v if v < 0 else v
        if a >= (np.int64(1) << MAX_BITS):
            return -2, 0
        if a < DIRECT:
            t = a
        else:
            bl = 0
            x = a
            while x:
                bl += 1
                x >>= 1
            t = DIRECT - 5 + bl
            need += bl - 1
        tok[i] = t
        if i < n_signed and a != 0:
            need += 1
        if split >= 0 and t >= split:
            any_big = True
    if nraw + need > raw.size:
        return -3, nraw + need
    head, ok = cdf_of(counts, c_lo, c_hi)
    if not ok:
        return -1, 0
    hw = head.shape[1] - 1
    if any_big:
        if tail.shape[0] != rows:
            return -1, 0
        tails, ok = cdf_of(tail, c_lo, c_hi)
        if not ok:
            return -1, 0
    else:
        tails = head
    for i in range(m):
        if (split if split >= 0 and tok[i] > split else tok[i]) >= hw:
            return -1, 0
    lo, hi = rows, -1
    n_big = 0
    for i in range(m):
        c, s = ctx[i], tok[i]
        if split >= 0 and s >= split:
            s = split
            n_big += 1
        start[k] = head[c, s]
        freq[k] = head[c, s + 1] - head[c, s]
        k += 1
        counts[c, s] += inc
        lo, hi = min(lo, c), max(hi, c)
    halve(counts, lo, hi, limit)
    if n_big:
        lo, hi = rows, -1
        for i in range(m):
            if tok[i] >= split:
                c, s = ctx[i], tok[i] - split
                start[k] = tails[c, s]
                freq[k] = tails[c, s + 1] - tails[c, s]
                k += 1
                tail[c, s] += inc
                lo, hi = min(lo, c), max(hi, c)
        halve(tail, lo, hi, limit)
    for i in range(min(n_signed, m)):
        if values[i] != 0:
            raw[nraw] = 1 if values[i] < 0 else 0
            nraw += 1
    for i in range(m):
        if tok[i] >= DIRECT:
            v = np.int64(values[i])
            a = -v if v < 0 else v
            for b in range(tok[i] - (DIRECT - 5) - 2, -1, -1):
                raw[nraw] = (a >> b) & 1
                nraw += 1
    return k, nraw

@_jit
def encode_all(start, freq, k, out):
    """rANS of the k recorded intervals, last first; the bytes end ``out``. Returns
    where they begin."""
    x = np.uint64(_L)
    p = out.size
    for i in range(k - 1, -1, -1):
        f = np.uint64(freq[i])
        x_max = np.uint64((_L >> 16) << 8) * f
        while x >= x_max:
            p -= 1
            out[p] = np.uint8(x & np.uint64(0xFF))
            x >>= np.uint64(8)
        # x < 2**31 and f < 2**16 here: a 32-bit division serves
        q = np.uint32(x) // np.uint32(f)
        x = (np.uint64(q) << np.uint64(16)) + (x - np.uint64(q) * f) + np.uint64(start[i])
    for _ in range(4):
        p -= 1
        out[p] = np.uint8(x & np.uint64(0xFF))
        x >>= np.uint64(8)
    return p

@nb.njit(cache=True, nogil=True, inline="always")
def _decode_one(x, p, data, cdf, c, width):
    """One rANS decoding step under cumulative row ``cdf[c]``: (symbol, state, position).
    Where the bytes run out (only in a stream no encoder wrote) the state is set to its
    lower bound."""
    slot = np.int64(x & np.uint64(0xFFFF))
    s = 0
    while s < width - 1 and cdf[c, s + 1] <= slot:
        s += 1
    x = np.uint64(cdf[c, s + 1] - cdf[c, s]) * (x >> np.uint64(16)) + np.uint64(slot - cdf[c, s])
    while x < np.uint64(_L) and p < data.size:
        x = (x << np.uint64(8)) | np.uint64(data[p])
        p += 1
    if x < np.uint64(_L):
        x = np.uint64(_L)
    return s, x, p


@_jit
def decode(st, data, counts, ctx, sym, inc, limit):
    """Decode ``sym.size`` symbols under rows ``counts[ctx[i]]`` (st: state, position),
    counting them in with ``inc > 0``. Returns 0, or -1 for a context or table out of range."""
    rows, width = counts.shape
    lo, hi = ctx_range(ctx, rows)
    if hi < lo and ctx.size:
        return -1
    cdf, ok = cdf_of(counts, lo, hi)
    if not ok:
        return -1
    x, p = st[0], np.int64(st[1])
    lo, hi = rows, -1
    for i in range(sym.size):
        c = ctx[i]
        s, x, p = _decode_one(x, p, data, cdf, c, width)
        sym[i] = s
        if inc > 0:
            counts[c, s] += inc
            lo, hi = min(lo, c), max(hi, c)
    if inc > 0:
        halve(counts, lo, hi, limit)
    st[0], st[1] = x, np.uint64(p)
    return 0

@_jit
def get_tokens(st, data, counts, tail, split, ctx, n_signed, raw, pos, inc, limit, DIRECT, out):
    """Inverse of :func:`put_tokens`: fills ``out`` with the values and returns the raw
    bits' new position, or -1 for a context or count table out of range, -2 when the
    raw bits run out. The tables are counted as the symbols come (decoding reads the
    cumulative copies made at the start, so that changes nothing within the call)."""
    m = ctx.size
    rows = counts.shape[0]
    c_lo, c_hi = ctx_range(ctx, rows)
    if c_hi < c_lo and m:
        return -1
    head, ok = cdf_of(counts, c_lo, c_hi)
    if not ok:
        return -1
    hw = head.shape[1] - 1
    x, p = st[0], np.int64(st[1])
    n_big = 0
    n_signs = 0
    lo, hi = rows, -1
    for i in range(m):
        c = ctx[i]
        s, x, p = _decode_one(x, p, data, head, c, hw)
        out[i] = s
        counts[c, s] += inc
        lo, hi = min(lo, c), max(hi, c)
        if split >= 0 and s == split:
            n_big += 1
        if i < n_signed and s != 0:
            n_signs += 1
    halve(counts, lo, hi, limit)
    if n_big:
        if tail.shape[0] != rows:
            return -1
        tails, ok = cdf_of(tail, c_lo, c_hi)
        if not ok:
            return -1
        tw = tails.shape[1] - 1
        lo, hi = rows, -1
        for i in range(m):
            if out[i] == split:
                c = ctx[i]
                s, x, p = _decode_one(x, p, data, tails, c, tw)
                out[i] += s
                tail[c, s] += inc
                lo, hi = min(lo, c), max(hi, c)
        halve(tail, lo, hi, limit)
    st[0], st[1] = x, np.uint64(p)
    # signs first, then mantissas (put_tokens' order); raw bits checked as they are read
    sp, mp, end = pos, pos + n_signs, raw.size
    if mp > end:
        return -2
    for i in range(m):
        t = out[i]
        if t >= DIRECT:
            nb_ = t - (DIRECT - 5) - 1
            if mp + nb_ > end:
                return -2
            a = np.int64(1)
            for _ in range(nb_):
                a = (a << 1) | np.int64(raw[mp])
                mp += 1
            out[i] = a
        if i < n_signed and t != 0:
            if raw[sp]:
                out[i] = -out[i]
            sp += 1
    return mp


# ------------------------------------------------------------------ context models (coefcode.py)

@_jit
def tail_context(own, ext, idx, k, k_table, own_table, gap_table, n_own, n_gap, out):
    """``coefcode._tail_context``: each class a lookup in its table, values past the table's
    end in its last class."""
    kt, ot, gt = k_table.size - 1, own_table.size - 1, gap_table.size - 1
    for i in range(idx.size):
        j = idx[i]
        kk = k[i]
        o = own[j]
        g = ext[j] - kk
        out[i] = ((k_table[min(kk, kt)] * n_own + own_table[min(o, ot)]) * n_gap + gap_table[min(g, gt)])


@_jit
def scatter(grid, rows, cols, values):
    """``grid[rows, cols] = values`` (the indices are the coder's own, in range)."""
    for i in range(values.size):
        grid[rows[i], cols[i]] = values[i]


# ------------------------------------------------------------------ block KLT (klt.py)

@_jit
def rdo_histogram(q, mags):
    """(K, mags) float64 counts of the non-zero magnitudes (capped) of components 1..K-1."""
    kk, n = q.shape
    hist = np.zeros((kk, mags), np.float64)
    for k in range(1, kk):
        for j in range(n):
            v = q[k, j]
            if v != 0:
                hist[k, min(abs(v), mags - 1)] += 1.0
    return hist


@_jit
def rdo_choose(q, x, table, bits, zero_run, lam, mags):
    """The choices of ``klt.rdo_levels``, patch by patch, with the same float32 and float64
    operations in the same order as the array version they replaced, so the same levels
    (checked on 30 cases; 64 x 65,536 coefficients at step 5, counting included: 76 -> 15 ms)."""
    kk, n = q.shape
    one = np.float32(1.0)
    for k in range(1, kk):  # row by row: the arrays are component-major
        for j in range(n):
            v = q[k, j]
            if v == 0:
                continue
            m = abs(v)
            a = np.float32(abs(x[k, j]))
            d = a - np.float32(m)
            cell = k * mags + min(m, mags - 1)
            keep = d * d + table[cell]
            d1 = d + one
            drop = d1 * d1 + table[cell - 1 if m < mags else cell]
            if drop < keep:
                m -= 1
            q[k, j] = -m if v < 0 else m
    last = np.zeros(n, np.int64)
    prev = np.zeros(n, np.int64)
    for _ in range(2):  # each patch's last non-zero level, twice
        last[:] = 0
        prev[:] = 0
        for k in range(1, kk):
            for j in range(n):
                if q[k, j] != 0:
                    prev[j] = last[j]
                    last[j] = k
        for j in range(n):
            lk, pk = last[j], prev[j]
            if lk == 0:
                continue
            lm = abs(q[lk, j])
            la = abs(x[lk, j])
            saved = bits[lk, min(lm, mags - 1)] - bits[lk, 0] + zero_run[lk] - zero_run[pk + 1]
            e = np.float64(la) - np.float64(lm)
            if np.float64(la * la) - e * e < lam * saved:
                q[lk, j] = 0


@nb.njit(cache=True, nogil=True, inline="always")
def _edge(p1, p0, q0, q1, limit, jump, flat):
    across = q0 - p0
    d = (np.float32(4.0) * across + (p1 - q1)) * np.float32(0.125)
    d = min(max(d, -limit), limit)
    if abs(across) < jump and abs(p1 - p0) < flat and abs(q1 - q0) < flat:
        return p0 + d, q0 - d
    return p0, q0


@_jit
def deblock(planes, block, limit, jump, flat):
    """``klt.deblock`` on a stack (N, H, W) in place: edge by edge, vertical edges first, with
    the same float operations in the same order as the array version it replaced, so the
    same pixels (checked on 27 planes and stacks; 4 MP: 11 -> 3 ms)."""
    n, h, w = planes.shape
    for i in range(n):
        for y in range(h):
            for x in range(block, w, block):
                planes[i, y, x - 1], planes[i, y, x] = _edge(planes[i, y, x - 2], planes[i, y, x - 1],
                                                            planes[i, y, x], planes[i, y, x + 1], limit, jump, flat)
        for y in range(block, h, block):
            for x in range(w):
                planes[i, y - 1, x], planes[i, y, x] = _edge(planes[i, y - 2, x], planes[i, y - 1, x],
                                                            planes[i, y, x], planes[i, y + 1, x], limit, jump, flat)


# ------------------------------------------------------------------ hyperprior latent contexts

@_jit
def latent_contexts(values, offset, table, table_min, bucket, activity, rows, ctx):
    """For hyperprior.encode_latents: ``rows[y, c, x] = values - offset`` and every latent's
    context, its scale bucket ``(table - table_min) // bucket * activity`` plus, below row 0,
    the row above's activity ``min((TL + 2T + TR + 1) // 2, activity - 1)`` of magnitudes in
    the same channel (edges replicated), as hyperprior._row_context makes it for the decoder.
    All (C, h, w) in, (h, C, w) out. Returns the largest magnitude (rows hold it wrapped to
    32 bits; the caller checks it first)."""
    n_c, h, w = values.shape
    big = 0
    for c in range(n_c):
        for y in range(h):
            for x in range(w):
                v = np.int64(values[c, y, x]) - np.int64(offset[c, y, x])
                m = v if v >= 0 else -v
                if m > big:
                    big = m
                rows[y, c, x] = v
                ctx[y, c, x] = (np.int64(table[c, y, x]) - table_min) // bucket * activity
    for y in range(1, h):
        for c in range(n_c):
            for x in range(w):
                t = abs(np.int64(rows[y - 1, c, x]))
                tl = abs(np.int64(rows[y - 1, c, x - 1])) if x > 0 else t
                tr = abs(np.int64(rows[y - 1, c, x + 1])) if x < w - 1 else t
                ctx[y, c, x] += min((tl + 2 * t + tr + 1) // 2, activity - 1)
    return big
