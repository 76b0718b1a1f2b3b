"""Detections recomputed only where a reconstruction can differ equal scikit-image's own
whole-image calls (``skimage.feature.blob_log``, ``skimage.feature.canny``) on the images
scikit-image bundles, and the sparse matching equals the dense Hungarian assignment."""

import numpy as np
import pytest
from scipy.ndimage import distance_transform_edt
from scipy.optimize import linear_sum_assignment
from skimage import data, feature

from workbench import pipeline
from workbench.formats.imagefiles import SourceImage
from workbench.quality import localdetect, measures
from workbench.settings import Settings


def _grey(name):
    px = getattr(data, name)()
    px = (px * 200 + 20).astype(np.uint8) if px.dtype == bool else px
    return px[:256, :256]


def _reconstructions(px, steps=(2.0, 8.0, 24.0)):
    for step in steps:
        rec = pipeline.encode([SourceImage("r", px)], Settings(step=step)).images[0].reconstruction
        yield step, measures.grey(rec, 255)


# scikit-image's bundled 'moon' (sparse craters), 'hubble_deep_field' (many faint objects,
# a higher threshold keeps the bright ones) and 'horse' (a silhouette)
SPOT_CASES = [("moon", 0.05), ("hubble_deep_field", 0.2), ("horse", 0.05)]


@pytest.mark.parametrize("name,threshold", SPOT_CASES)
def test_spots_on_reconstructions_are_blob_logs_own(name, threshold):
    px = _grey(name)
    kw = dict(min_sigma=1.0, max_sigma=6.0, num_sigma=6, threshold=threshold)
    detector = localdetect.LogSpots(measures.grey(px, 255), **kw)
    assert np.array_equal(detector.blobs, feature.blob_log(measures.grey(px, 255), **kw))
    for step, g in _reconstructions(px):
        assert np.array_equal(detector.detect(g), feature.blob_log(g, **kw)), f"step {step}"


@pytest.mark.parametrize("name", ["moon", "horse", "coins", "cell"])
def test_edges_on_reconstructions_are_cannys_own(name):
    px = _grey(name)
    detector = localdetect.CannyEdges(measures.grey(px, 255), sigma=2.0)
    for step, g in _reconstructions(px):
        assert np.array_equal(detector.detect(g), feature.canny(g, sigma=2.0)), f"step {step}"


def _whole_image_call(*_a, **_k):
    raise AssertionError("the whole-image call was made")


def test_sparse_spots_with_a_small_error_are_recomputed_in_crops_only(monkeypatch):
    px = _grey("moon")  # scikit-image's 'moon': a few craters respond
    spots = localdetect.LogSpots(measures.grey(px, 255), min_sigma=1.0, max_sigma=6.0, num_sigma=6, threshold=0.05)
    g = next(_reconstructions(px, (2.0,)))[1]
    want = feature.blob_log(g, min_sigma=1.0, max_sigma=6.0, num_sigma=6, threshold=0.05)
    assert spots.candidates(g).mean() < 0.5
    monkeypatch.setattr(spots, "_cube", _whole_image_call)
    monkeypatch.setattr(spots, "_full", _whole_image_call)
    assert np.array_equal(spots.detect(g), want)


def test_sparse_edges_with_a_small_error_are_recomputed_in_crops_only(monkeypatch):
    px = _grey("cell")  # scikit-image's 'cell': one cell on a flat background
    edges = localdetect.CannyEdges(measures.grey(px, 255), sigma=2.0)
    g = next(_reconstructions(px, (2.0,)))[1]
    want = feature.canny(g, sigma=2.0)
    shapes = []
    monkeypatch.setattr(edges, "_full", lambda crop: shapes.append(crop.shape) or feature.canny(crop, sigma=2.0))
    assert np.array_equal(edges.detect(g), want)
    assert shapes and sum(h * w for h, w in shapes) < 0.5 * g.size


def test_an_unchanged_image_needs_only_the_tiles_where_the_original_responds():
    g0 = measures.grey(_grey("moon"), 255)
    spots = localdetect.LogSpots(g0, min_sigma=1.0, max_sigma=6.0, num_sigma=6, threshold=0.05)
    responds = np.zeros_like(spots.tiles[0], bool)
    for t in spots.tiles:
        responds |= t > 0.05 * (1 - localdetect.SLACK) - localdetect.ABS_SLACK
    assert np.array_equal(spots.candidates(g0), responds)


def test_images_of_another_shape_or_type_are_refused_with_the_shape_named():
    spots = localdetect.LogSpots(np.zeros((64, 64), np.float32), min_sigma=1, max_sigma=3, num_sigma=3, threshold=0.1)
    with pytest.raises(ValueError, match=r"\(64, 64\)"):
        spots.detect(np.zeros((32, 64), np.float32))
    with pytest.raises(ValueError, match="float64"):
        spots.detect(np.zeros((64, 64)))


def _dense_match(a, b, radius):
    d = np.hypot(a[:, None, 0] - b[None, :, 0], a[:, None, 1] - b[None, :, 1])
    ia, ib = linear_sum_assignment(np.where(d <= radius, d, radius * 1e6 + 1.0))
    keep = d[ia, ib] <= radius
    return ia[keep], ib[keep], d[ia[keep], ib[keep]]


def test_matching_in_groups_equals_the_dense_hungarian_assignment():
    rng = np.random.default_rng(5)
    for trial in range(60):
        n, m = rng.integers(1, 60, 2)
        a, b = rng.uniform(0, 40, (n, 2)), rng.uniform(0, 40, (m, 2))
        if trial % 2:  # integer positions: ties and pairs exactly at the radius
            a, b = np.round(a), np.round(b)
        ia, ib, d = measures.match_points(a, b, 3.0)
        ja, jb, e = _dense_match(a, b, 3.0)
        assert len(ia) == len(ja) and d.sum() == pytest.approx(e.sum(), abs=1e-9)
        assert len(set(ia)) == len(ia) and len(set(ib)) == len(ib) and np.all(d <= 3.0)


def test_the_within_lookup_is_the_distance_transforms():
    rng = np.random.default_rng(2)
    marks, at = rng.random((60, 70)) < 0.05, rng.random((60, 70)) < 0.2
    for radius in (1.0, 1.5, 2.0, 2.9):
        assert np.array_equal(measures.within(marks, at, radius), distance_transform_edt(~marks)[at] <= radius)
