"""Measurements on original and reconstruction, against scikit-image's own functions and
hand-built cases with known answers."""

import numpy as np
import pytest
from skimage import data, feature, filters, measure

import workbench
from workbench import pipeline
from workbench.quality import measures
from workbench.errors import InputError
from workbench.formats.imagefiles import SourceImage
from workbench.settings import Settings


@pytest.fixture(scope="module")
def hubble():
    """scikit-image's bundled 'hubble_deep_field' (RGB): countable bright objects; a crop."""
    return data.hubble_deep_field()[:256, :256]


def test_spots_on_the_original_are_scikit_images_blob_log(hubble):
    m = measures.Spots(min_sigma=1.5, max_sigma=5, threshold=0.08)
    direct = feature.blob_log(measures.grey(hubble, 255), min_sigma=1.5, max_sigma=5, num_sigma=6, threshold=0.08)
    assert np.array_equal(m.find(hubble, 255).blobs, direct) and len(direct) > 10


def test_grey_is_scikit_images_rgb2gray(hubble):
    from skimage.color import rgb2gray

    assert np.allclose(measures.grey(hubble, 255), rgb2gray(hubble), atol=1e-6)  # float32


def test_regions_on_the_original_are_otsu_and_connected_components():
    coins = data.coins()  # scikit-image's bundled 'coins'
    level, mask, count = measures.Regions(min_area=1).find(coins, 255)
    g = coins / 255.0
    t = filters.threshold_otsu(g)
    assert np.array_equal(mask, g > t)  # a continuous image: the midway cut splits as Otsu's does
    assert count == measure.label(g > t).max()


@pytest.mark.parametrize("m", [measures.Spots(), measures.Regions(), measures.Edges()], ids=lambda m: m.name)
def test_a_lossless_reconstruction_changes_nothing(m, hubble):
    v = m.compare(m.find(hubble, 255), hubble, 255)
    assert all(c.holds(v) for c in m.checks)
    assert all(c.fraction(v) == 0 for c in m.checks)


def test_measured_change_grows_with_the_quantiser_step():
    blobs = (data.binary_blobs(192, blob_size_fraction=0.08, rng=3) * 180 + 30).astype(np.uint8)  # scikit-image
    ms = [measures.Spots(), measures.Regions(), measures.Edges()]
    ref = measures.Reference(ms, blobs, 255)
    used = []
    for step in (1.0, 32.0, 64.0):  # spots on flat-topped blobs move by a few even at 58 dB: steps well apart
        rec = pipeline.encode([SourceImage("b", blobs)], Settings(step=step)).images[0].reconstruction
        outcome = ref.judge(rec)
        used.append(sum(c.fraction(outcome.values[m.name]) for m in ms for c in m.checks))
    assert used[0] < used[1] < used[2]


def test_matching_is_one_to_one_within_the_radius():
    # Hand-built: (0,0)-(0,1) at distance 1 pair up; (10,10) has no partner within 3 px.
    ia, ib, d = measures.match_points([(0, 0), (10, 10)], [(0, 1), (30, 30)], radius=3)
    assert list(ia) == [0] and list(ib) == [0] and list(d) == [1.0]
    # Two originals compete for one found point: only one is matched.
    ia, ib, d = measures.match_points([(0, 0), (0, 2)], [(0, 1)], radius=3)
    assert len(ia) == 1 and d[0] == 1.0
    # The assignment minimises the total distance (not greedy): a-b' and a'-b.
    ia, ib, d = measures.match_points([(0, 0), (0, 2.5)], [(0, 2), (0, 4)], radius=3)
    assert sorted(zip(ia, ib)) == [(0, 0), (1, 1)] and d.sum() == pytest.approx(3.5)


def test_spot_counts_missed_spurious_and_shift_on_a_hand_built_frame():
    def frame(points):
        yy, xx = np.mgrid[:64, :64]
        img = np.zeros((64, 64))
        for y, x in points:
            img += np.exp(-((yy - y) ** 2 + (xx - x) ** 2) / (2 * 2.0**2))
        return (np.clip(img, 0, 1) * 255).astype(np.uint8)

    m = measures.Spots(min_sigma=1, max_sigma=4, threshold=0.05)
    ref = m.find(frame([(16, 16), (16, 48), (48, 32)]), 255)
    assert len(ref.blobs) == 3
    v = m.compare(ref, frame([(16, 17), (16, 48), (30, 30)]), 255)  # one moved 1 px, one gone, one new
    assert (v["count_error"], v["missed"], v["spurious"]) == (0, 1, 1)
    assert v["shift_px"] == pytest.approx(0.5, abs=0.05)


def test_edge_f_score_within_the_tolerance_on_a_shifted_step():
    def step_at(x):
        img = np.zeros((64, 64), np.uint8)
        img[:, x:] = 200
        return img

    m = measures.Edges(sigma=1.0, tolerance=1.5)
    ref = m.find(step_at(32), 255)
    assert m.compare(ref, step_at(33), 255)["f_score"] == 1.0  # 1 px: within tolerance
    assert m.compare(ref, step_at(36), 255)["f_score"] == 0.0  # 4 px: every edge misplaced


def test_a_users_measurement_file_is_run_on_both_images(tmp_path):
    f = tmp_path / "bright.py"
    f.write_text("import numpy as np\ndef measure(pixels):\n    return {'mean': float(np.mean(pixels))}\n")
    (m,) = measures.parse(str(f))
    img = np.full((8, 8), 100, np.uint8)
    v = m.compare(m.find(img, 255), img + 2, 255)
    assert v["mean"] == 100 and v["mean_rec"] == 102 and v["worst_change"] == pytest.approx(0.02)
    assert not m.checks[0].holds(v)  # the default tolerance is a 1 % relative change


def test_a_broken_measurement_file_is_one_clear_error(tmp_path):
    f = tmp_path / "bad.py"
    f.write_text("raise RuntimeError('boom')\n")
    with pytest.raises(InputError, match="failed to load"):
        measures.parse(str(f))
    with pytest.raises(InputError, match="unknown measurement"):
        measures.parse("spots,cells")


def test_tolerances_replace_the_defaults_on_the_same_number():
    (m,) = measures.parse("spots", ["spots.shift_px<=0.25"])
    assert {c.text() for c in m.checks} == {"count_error <= 1", "shift_px <= 0.25"}
    with pytest.raises(InputError, match="names no chosen"):
        measures.parse("spots", ["regions.dice>=0.9"])


def test_the_safe_point_is_the_lowest_rate_from_which_every_point_passes():
    pts = [{"bpp": 0.5, "ok": True}, {"bpp": 1.0, "ok": False}, {"bpp": 2.0, "ok": True}, {"bpp": 3.0, "ok": True}]
    assert measures.safe_point(pts)["bpp"] == 2.0  # 0.5 passes by chance below a failing rate
    assert measures.safe_point([{"bpp": 1.0, "ok": False}]) is None


def test_rate_control_for_the_measurements_meets_them_at_a_coarser_step_than_needed_for_lossless():
    blobs = (data.binary_blobs(128, blob_size_fraction=0.1, rng=5) * 180 + 30).astype(np.uint8)
    ms = measures.parse("regions,edges")
    r = pipeline.encode([SourceImage("b", blobs)], Settings(), measures=ms, target_measures=True).images[0]
    assert r.target_met and r.measured.ok and r.step > 4.0
    # and the reconstruction really passes when decoded from the bytes
    again = measures.Reference(ms, blobs, 255).judge(workbench.decompress(
        pipeline.encode([SourceImage("b", blobs)], Settings(step=r.step)).data)["b"])
    assert again.ok


def test_measuring_until_the_first_failure_finds_the_same_safe_point():
    blobs = (data.binary_blobs(128, blob_size_fraction=0.1, rng=5) * 180 + 30).astype(np.uint8)  # scikit-image
    ref = measures.Reference(measures.parse("regions,edges", ["regions.dice>=0.9999"]), blobs, 255)  # fails at 96
    img, s = SourceImage("b", blobs), Settings()
    steps = (2.0, 6.0, 12.0, 24.0, 48.0, 96.0, 160.0)

    def safe(points):
        return measures.safe_point([{"bpp": p.bpp, **({} if p.measured is None else {"ok": p.measured.ok})}
                                    for p in points])

    full = pipeline.rd_points(img, s, steps, with_ssim=False, measure_ref=ref)
    short = pipeline.rd_points(img, s, steps, with_ssim=False, measure_ref=ref, measure_until_failure=True)
    assert any(p.measured is None for p in short) and not any(p.measured is None for p in full)
    assert safe(short)["bpp"] == safe(full)["bpp"]
