"""The tokens' entropy coder (rANS over integer counts): exact round trips, the Shannon
bound, the models' counting, and streams no encoder wrote."""

import numpy as np
import pytest

from workbench.codecs import ans, coefcode, symbols
from workbench.errors import BundleError


def _source(rng, n, counts):
    ctx = rng.integers(0, counts.shape[0], n)
    p = counts[ctx] / counts[ctx].sum(axis=1, keepdims=True)
    sym = (np.cumsum(p, axis=1) < rng.random((n, 1))).sum(axis=1)
    return ctx, np.minimum(sym, counts.shape[1] - 1)


def test_symbols_under_changing_tables_decode_exactly():
    rng = np.random.default_rng(1)
    for trial in range(40):
        width = int(rng.integers(2, 31))
        tables = [rng.integers(1, 65536 // width + 1, (int(rng.integers(1, 40)), width)) for _ in range(4)]
        enc, calls = ans.Encoder(), []
        for t in tables:
            ctx, sym = _source(rng, int(rng.integers(0, 3000)), t)
            enc.encode(t, ctx, sym)
            calls.append((t, ctx, sym))
        dec = ans.Decoder(enc.finish())
        for t, ctx, sym in calls:
            assert np.array_equal(dec.decode(t, ctx), sym)


def test_a_stationary_source_costs_within_a_thousandth_of_its_entropy():
    # Shannon's source coding theorem (1948): no code beats the entropy, and an arithmetic-
    # type coder with exact probabilities comes within a few bytes of it (Cover & Thomas,
    # Elements of Information Theory, 2nd ed., sec. 13.3). These counts scale exactly to the
    # coder's 2**16 total, so the ideal length is -sum(log2 p).
    counts = np.array([[32768, 16384, 8192, 4096, 2048, 1024, 512, 512]])
    p = counts[0] / counts[0].sum()
    rng = np.random.default_rng(2)
    sym = rng.choice(counts.shape[1], 400_000, p=p)
    enc = ans.Encoder()
    enc.encode(counts, np.zeros(sym.size, np.int64), sym)
    ideal = -np.log2(p[sym]).sum() / 8
    assert ideal <= len(enc.finish()) <= ideal * 1.001 + 8


def test_adaptive_counting_matches_the_context_models_reference():
    # the compiled counting must do what coefcode.add_counts does in numpy
    rng = np.random.default_rng(3)
    counts = rng.integers(1, 8000, (50, 9))
    mirror = counts.astype(np.float32)
    ref = counts.copy()
    enc = ans.Encoder()
    for _ in range(20):
        ctx, sym = _source(rng, int(rng.integers(1, 5000)), ref)
        coefcode.add_counts(ref, mirror, ctx, sym)
        enc.encode(counts, ctx, sym, (symbols.INCREMENT, symbols.COUNT_LIMIT))
        assert np.array_equal(counts, ref)


def test_every_token_magnitude_round_trips_through_the_compiled_token_pass():
    rng = np.random.default_rng(4)
    models = coefcode._Models([0])
    values = np.round(rng.laplace(0, 40, 5000)).astype(np.int64)
    values[[0, 1, 2]] = [(1 << 26) - 1, -(1 << 25), 16]
    ctx = np.full(values.size, models.offset[0, "low"], np.int64)
    w = symbols.Writer(int_coder=True)
    w.put(models, ctx, values, n_signed=4000)  # the last 1000 carry no sign
    data = w.finish()
    got = symbols.Reader(data, int_coder=True).get(coefcode._Models([0]), ctx, n_signed=4000)
    want = values.copy()
    want[4000:] = np.abs(want[4000:])
    assert np.array_equal(got, want)


def test_a_magnitude_beyond_the_coders_range_is_refused():
    w = symbols.Writer(int_coder=True)
    with pytest.raises(ValueError, match="26-bit range"):
        w.put(coefcode._Models([0]), np.zeros(1, np.int64), np.array([1 << 26]))


def test_bytes_no_encoder_wrote_decode_to_something_or_fail_cleanly():
    rng = np.random.default_rng(5)
    counts = rng.integers(1, 5000, (30, 9))
    for _ in range(300):
        junk = rng.integers(0, 256, int(rng.integers(0, 60))).astype(np.uint8).tobytes()
        got = ans.Decoder(junk).decode(counts, rng.integers(0, 30, 2000))
        assert got.min() >= 0 and got.max() < 9
    models = coefcode._Models([0])
    ctx = np.zeros(100, np.int64)
    for _ in range(100):  # a token stream whose raw bits run out is a BundleError
        junk = b"\0\0\0\0\0\0\0\0" + rng.integers(0, 256, 40).astype(np.uint8).tobytes()
        try:
            symbols.Reader(junk, int_coder=True).get(models, ctx)
        except BundleError:
            pass


def test_tables_out_of_range_are_refused():
    enc = ans.Encoder()
    with pytest.raises(ValueError):
        enc.encode(np.array([[0, 5]]), np.zeros(1, np.int64), np.zeros(1, np.int64))  # a zero count
    with pytest.raises(ValueError):
        enc.encode(np.array([[40000, 40000]]), np.zeros(1, np.int64), np.zeros(1, np.int64))  # total > 2**16
    with pytest.raises(ValueError):
        enc.encode(np.array([[1, 1]]), np.array([1]), np.zeros(1, np.int64))  # no such context
