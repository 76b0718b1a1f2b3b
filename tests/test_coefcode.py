import numpy as np
import pytest

from workbench.codecs import coefcode
from workbench.errors import BundleError


def _grid(seed, shape):
    rng = np.random.default_rng(seed)
    q = np.round(rng.laplace(0, 2.0, shape) / (1 + np.arange(shape[2]))).astype(np.int64)
    q[:, :, 0] = np.cumsum(rng.integers(-5, 6, shape[:2]), axis=1) * 40
    return q


@pytest.mark.parametrize("shape", [(1, 1, 1), (1, 7, 3), (2, 3, 2), (9, 1, 16), (40, 33, 64), (131, 5, 12)])
def test_grids_round_trip_exactly(shape):
    q = _grid(1, shape)
    assert np.array_equal(coefcode.decode_grids(coefcode.encode_grids([q], [0]), [shape], [0])[0], q)


def test_extreme_values_use_escapes_and_round_trip():
    q = np.zeros((3, 4, 5), np.int64)
    q[0, 0, 0] = 2**coefcode.MAX_BITS - 1
    q[1, 2, 3] = -(2 ** (coefcode.MAX_BITS - 3))
    q[2, 3, 4] = 16
    assert np.array_equal(coefcode.decode_grids(coefcode.encode_grids([q], [0]), [q.shape], [0])[0], q)


def test_values_beyond_the_coder_range_are_refused_by_name():
    q = np.zeros((2, 2, 3), np.int64)
    q[1, 1, 2] = 2**coefcode.MAX_BITS
    with pytest.raises(ValueError, match="exceeds"):
        coefcode.encode_grids([q], [0])


def test_several_grids_share_models_and_round_trip():
    grids = [_grid(2, (20, 30, 10)), _grid(3, (10, 15, 10)), _grid(4, (10, 15, 10))]
    data = coefcode.encode_grids(grids, [0, 1, 1])
    out = coefcode.decode_grids(data, [g.shape for g in grids], [0, 1, 1])
    assert all(np.array_equal(a, b) for a, b in zip(grids, out))


def test_rate_tracks_the_entropy_of_the_source():
    # An adaptive coder on i.i.d. symbols should approach the empirical entropy (Shannon 1948);
    # we allow 3 % for model learning on 64k symbols.
    rng = np.random.default_rng(5)
    q = np.zeros((256, 256, 2), np.int64)
    q[:, :, 1] = rng.geometric(0.5, (256, 256)) - 1
    bits = 8 * len(coefcode.encode_grids([q], [0]))
    _, counts = np.unique(q[:, :, 1], return_counts=True)
    p = counts / counts.sum()
    entropy_bits = q[:, :, 1].size * (-(p * np.log2(p)).sum() + (p[1:].sum()))  # + one sign bit per non-zero
    assert bits < 1.03 * entropy_bits + 2000


def test_truncated_stream_raises_bundle_error():
    q = _grid(6, (10, 10, 8))
    data = coefcode.encode_grids([q], [0])
    with pytest.raises(BundleError):
        coefcode.decode_grids(data[: len(data) // 2], [q.shape], [0])


def test_streams_coded_before_version_7_with_constriction_still_decode(monkeypatch):
    # A bundle of version 6 and before: KLT payload without the INT_TOKENS flag, its tokens
    # through constriction's range coder. scikit-image's astronaut at three steps.
    from skimage import data

    from workbench import pipeline
    from workbench.codecs import klt
    from workbench.formats.imagefiles import SourceImage
    from workbench.settings import Settings

    img = SourceImage("astronaut", data.astronaut()[:128, :160])
    for step in (3.0, 12.0, 40.0):
        s = Settings(step=step)
        planes = pipeline.image_planes(img, s.chroma)
        with monkeypatch.context() as m:
            m.setattr(coefcode, "INT_CODER", False)
            coded = klt.CODEC.quantise(klt.CODEC.analyse(planes, s, None), step=step, count=None)
            old = klt.CODEC.serialise(coded)
        assert not old[6] & klt.INT_TOKENS
        new = klt.CODEC.serialise(coded)
        assert new[6] & klt.INT_TOKENS and new != old
        for payload in (old, new):
            got = klt.CODEC.decode(payload, [p.shape for p in planes], s)
            assert all(np.array_equal(g, w) for g, w in zip(got, coded.planes))
