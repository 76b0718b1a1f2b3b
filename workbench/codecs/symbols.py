"""The symbol stream under every coefficient and latent coder: magnitude tokens, raw sign
and mantissa bits, and the entropy coder under the tokens.

A value ``q`` is coded as the token ``t = |q|`` for ``|q| < DIRECT``; above that ``t = DIRECT
- 5 + bitlength(|q|)`` followed by ``bitlength - 1`` raw mantissa bits (the leading one is
implied); signs are raw bits. Tokens of the adaptive context models (:mod:`coefcode`, the
hyperprior's latent coder) go through :mod:`workbench.codecs.ans`, which reads the models'
integer counts; tokens under a model file's fixed tables, and every token of streams made
before bundle version 7, go through constriction's range coder under the probabilities the
caller gives. The raw bits follow the coded bytes. A stream is ``u32 n | u32 raw bits |
coded | packed bits``, n counting bytes (ans) or 32-bit words (constriction).
"""

from __future__ import annotations

import struct

import constriction
import numpy as np

from ..errors import BundleError
from . import ans

DIRECT = 16
MAX_BITS = 26
INCREMENT = 32  # what one symbol adds to its count in the adaptive models
COUNT_LIMIT = 1 << 16  # a row whose total passes this is halved
ALPHABET = DIRECT + MAX_BITS - 4  # tokens for bit lengths 5..MAX_BITS
_FAMILY = constriction.stream.model.Categorical(perfect=False)


def check_magnitudes(values: np.ndarray, what: str = "coefficient") -> None:
    """Raise ValueError if some ``|value|`` is beyond the coder's MAX_BITS-bit range (before a
    cast to int32, which would wrap it silently); min and max, no full-size temporary."""
    if values.size:
        big = max(-int(values.min()), int(values.max()))
        if big >= 1 << MAX_BITS:
            raise ValueError(f"{what} magnitude {big} exceeds the coder's {MAX_BITS}-bit range")


def _tokens(mag: np.ndarray):
    """Token and number of mantissa bits of non-negative magnitudes."""
    check_magnitudes(mag)
    bitlen = np.frexp(mag.astype(np.float64))[1].astype(np.int64)
    esc = mag >= DIRECT
    tok = np.where(esc, DIRECT - 5 + bitlen, mag)
    nbits = np.where(esc, bitlen - 1, 0)
    return tok, nbits



class Writer:
    """Tokens through an entropy coder, signs and mantissa bits raw. With ``int_coder`` the
    adaptive tokens go through :mod:`workbench.codecs.ans` (reading the models' integer
    counts); otherwise through constriction's range coder (older streams, fixed tables)."""

    def __init__(self, int_coder: bool = False, reserve: int = 0):
        """``reserve``: the tokens expected (with ``int_coder``, allocated once)."""
        self.int_coder = int_coder
        self.enc = ans.Encoder(reserve) if int_coder else constriction.stream.queue.RangeEncoder()
        self.raw: list[np.ndarray] = []

    def put(self, models, ctx: np.ndarray, values: np.ndarray, n_signed: int | None = None) -> None:
        """Code ``values`` under the contexts ``ctx`` of adaptive ``models`` (``probabilities(ctx)``,
        ``update(ctx, tokens)`` and, where ``models.split`` is set, ``tail_probabilities(ctx)`` for
        the tokens from ``split`` on, as :class:`workbench.codecs.coefcode._Models`); the first
        ``n_signed`` (all by default) carry a sign, the rest are magnitudes."""
        if self.int_coder:
            # One compiled pass: tokens, both stages, the counting models.update would do
            # (the float rows, which only constriction reads, are left behind) and the raw bits.
            self.enc.tokens(models.counts, getattr(models, "tail", None), models.split, ctx, values, n_signed,
                            (INCREMENT, COUNT_LIMIT), (DIRECT, MAX_BITS))
            return
        mag = np.abs(values)
        tok, nbits = _tokens(mag)
        if tok.size:
            split = models.split
            head = tok if split is None else np.minimum(tok, split)
            self.enc.encode(head.astype(np.int32), _FAMILY, models.probabilities(ctx))
            if split is not None:
                big = tok >= split
                if big.any():
                    self.enc.encode((tok[big] - split).astype(np.int32), _FAMILY, models.tail_probabilities(ctx[big]))
            models.update(ctx, tok)
        signed = values if n_signed is None else values[:n_signed]
        self.raw.append((signed[signed != 0] < 0).astype(np.uint8))
        self._mantissas(nbits, mag)

    def put_fixed(self, probs: np.ndarray, values: np.ndarray) -> None:
        """Signed values under one fixed token distribution (for learned models)."""
        if self.int_coder:
            raise ValueError("fixed tables are coded by constriction's coder (a Writer without int_coder)")
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
        """``n u32 | raw bits u32 | coded stream | raw bits packed``: n counts bytes with
        ``int_coder``, 32-bit words without."""
        coded = self.enc.finish() if self.int_coder else self.enc.get_compressed().astype("<u4").tobytes()
        n = len(coded) if self.int_coder else len(coded) // 4
        if self.int_coder:
            bits = self.enc.raw_bits()
        else:
            bits = np.concatenate(self.raw) if self.raw else np.zeros(0, np.uint8)
        return struct.pack("<II", n, bits.size) + coded + np.packbits(bits).tobytes()


class Reader:
    """Inverse of :class:`Writer` (``int_coder`` as it was written with)."""

    def __init__(self, data: bytes, int_coder: bool = False):
        if len(data) < 8:
            raise BundleError("coefficient stream is truncated")
        n, n_bits = struct.unpack("<II", data[:8])
        end = 8 + (n if int_coder else 4 * n)
        if end + (n_bits + 7) // 8 > len(data):
            raise BundleError("coefficient stream is shorter than its header says")
        self.bits = np.unpackbits(np.frombuffer(data[end:], np.uint8))[:n_bits]
        self.pos = 0
        self.int_coder = int_coder
        if int_coder:
            self.dec = ans.Decoder(data[8:end])
            return
        words = np.frombuffer(data[8:end], dtype="<u4").astype(np.uint32)
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

    def get(self, models, ctx: np.ndarray, n_signed: int | None = None) -> np.ndarray:
        """Inverse of :meth:`Writer.put`."""
        if ctx.size == 0:
            self._values(np.zeros(0, np.int64), 0)
            return np.zeros(0, np.int64)
        if self.int_coder:
            try:
                values, self.pos = self.dec.tokens(models.counts, getattr(models, "tail", None), models.split, ctx,
                                                   n_signed, self.bits, self.pos, (INCREMENT, COUNT_LIMIT), DIRECT)
            except ValueError as exc:
                raise BundleError(f"coefficient stream is not decodable ({exc})") from None
            return values
        try:
            tok = np.asarray(self.dec.decode(_FAMILY, models.probabilities(ctx)), dtype=np.int64)
            split = models.split
            if split is not None:
                big = np.flatnonzero(tok == split)
                if big.size:
                    tok[big] += np.asarray(self.dec.decode(_FAMILY, models.tail_probabilities(ctx[big])), dtype=np.int64)
        except Exception as exc:
            raise BundleError(f"coefficient stream is not decodable ({exc})") from None
        models.update(ctx, tok)
        return self._values(tok, tok.size if n_signed is None else n_signed)

    def get_fixed(self, probs: np.ndarray, n: int) -> np.ndarray:
        """Inverse of :meth:`Writer.put_fixed`."""
        if self.int_coder:
            raise ValueError("fixed tables are coded by constriction's coder (a Reader without int_coder)")
        if n == 0:
            return np.zeros(0, np.int64)
        try:
            model = constriction.stream.model.Categorical(probs, perfect=False)
            tok = np.asarray(self.dec.decode(model, n), dtype=np.int64)
        except Exception as exc:
            raise BundleError(f"latent stream is not decodable ({exc})") from None
        return self._values(tok, n)

    def _values(self, tok: np.ndarray, n_signed: int) -> np.ndarray:
        esc = tok >= DIRECT
        mag = tok  # escaped entries are overwritten below
        nz = tok[:n_signed] > 0
        signs = self._take(int(nz.sum()))  # signs precede mantissas
        if esc.any():
            nb = tok[esc] - (DIRECT - 5) - 1
            bits = self._take(int(nb.sum())).astype(np.int64)
            pos = np.arange(bits.size) - np.repeat(np.cumsum(nb) - nb, nb)
            weights = np.left_shift(1, np.repeat(nb, nb) - 1 - pos)
            starts = np.cumsum(nb) - nb
            mant = np.add.reduceat(bits * weights, starts)
            mag[esc] = (np.int64(1) << nb) + mant
        neg = np.flatnonzero(nz)[signs == 1]
        mag[neg] = -mag[neg]
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
    w = Writer()
    for v, c in zip(channels, counts):
        w.put_fixed(c.astype(np.float64), np.asarray(v, dtype=np.int64))
    return w.finish()


def decode_fixed(data: bytes, sizes: list[int], counts: list[np.ndarray]) -> list[np.ndarray]:
    rd = Reader(data)
    return [rd.get_fixed(c.astype(np.float64), n) for n, c in zip(sizes, counts)]


def _groups(table: np.ndarray):
    """Positions of ``table`` (any shape) grouped by value: ``(values, order, starts)``, the
    groups in increasing value, positions within a group in C order."""
    flat = table.reshape(-1)
    if flat.size and (flat.min() < 0 or flat.max() > 65535):
        raise ValueError("table indices must lie in 0..65535")
    # A stable sort of 16-bit keys is numpy's radix sort: linear in the number of symbols.
    order = np.argsort(flat.astype(np.uint16), kind="stable")
    counts = np.bincount(flat, minlength=1)
    values = np.flatnonzero(counts)
    ends = np.cumsum(counts)[values]
    return values, order, np.concatenate([[0], ends])


def encode_grouped(values: np.ndarray, table: np.ndarray, tables: np.ndarray) -> bytes:
    """Signed ``values`` each coded under ``tables[table]`` (same shapes): one coder call per
    distinct table, in a order the decoder rebuilds from ``table`` alone."""
    w = Writer()
    flat = np.asarray(values, np.int64).reshape(-1)
    idx, order, starts = _groups(table)
    for t, a, b in zip(idx, starts[:-1], starts[1:]):
        w.put_fixed(tables[t].astype(np.float64), flat[order[a:b]])
    return w.finish()


def decode_grouped(data: bytes, table: np.ndarray, tables: np.ndarray) -> np.ndarray:
    """Inverse of :func:`encode_grouped`, shaped like ``table``."""
    rd = Reader(data)
    out = np.zeros(table.size, np.int64)
    idx, order, starts = _groups(table)
    for t, a, b in zip(idx, starts[:-1], starts[1:]):
        out[order[a:b]] = rd.get_fixed(tables[t].astype(np.float64), int(b - a))
    return out.reshape(table.shape)
