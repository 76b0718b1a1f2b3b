"""Rate control: the step search meets its target at the lowest cost."""

import numpy as np
import pytest

from workbench import pipeline, ratecontrol
from workbench.formats.imagefiles import SourceImage
from workbench.settings import Settings


def _enc(img, **kw):
    return pipeline.encode([SourceImage("x", img)], Settings(**kw)).images[0]


def test_target_psnr_is_met_by_the_coarsest_sufficient_step(astronaut):
    r = _enc(astronaut, target=("psnr", 34.0))
    assert r.target_met and r.psnr >= 34.0
    coarser = _enc(astronaut, step=r.step * 1.08)
    assert coarser.psnr < 34.0 + 0.5  # within the search's resolution of the threshold


def test_8bit_sources_become_lossless_at_fine_steps(camera):
    # Rounding to whole grey levels removes an error below half a level: PSNR is infinite.
    assert _enc(camera, target=("psnr", 119.0)).psnr == float("inf")


def test_target_ssim_is_met(camera):
    r = _enc(camera, target=("ssim", 0.9))
    assert r.target_met and r.ssim >= 0.9


def test_target_bpp_counts_the_whole_file(chelsea):
    r = _enc(chelsea, target=("bpp", 1.0))
    assert r.bpp <= 1.0 and r.bpp > 0.85


def test_unreachable_target_is_reported_not_met(camera16):
    # 16-bit data at the finest step (0.05 of an 8-bit level = 12.9 16-bit levels) stays near 90 dB.
    r = _enc(camera16, target=("psnr", 119.0))
    assert r.target_met is False


def test_search_step_on_a_monotone_function_finds_the_threshold():
    step, ok = ratecontrol.search_step(lambda s: 100 - s, "psnr", 60.0)
    assert ok and step == pytest.approx(40.0, rel=0.02) and 100 - step >= 60.0



def test_a_missed_target_is_explained_with_what_would_meet_it():
    from workbench.demo import fabric

    img = SourceImage("f", fabric(np.random.default_rng(1)))  # demo data: a fine colour weave
    r = pipeline.encode([img], Settings(target=("psnr", 40.0))).images[0]
    assert r.target_met is False and "out of reach" in r.advice
    reached = float(r.advice.split("With 4:4:4 chroma it reaches ")[1].split(" dB")[0])
    assert reached >= 40.0  # and the claim holds when tried:
    ok = pipeline.encode([img], Settings(chroma="444", target=("psnr", 40.0))).images[0]
    assert ok.target_met and ok.psnr >= 40.0


def test_a_rate_past_the_lossless_png_is_said():
    noise = np.random.default_rng(0).integers(0, 256, (64, 64), dtype=np.uint8)
    r = pipeline.encode([SourceImage("n", noise)], Settings(step=0.05)).images[0]
    assert r.advice and "lossless PNG" in r.advice


def _counting_quantise(monkeypatch):
    from workbench.codecs.klt import CODEC

    calls = []
    real = CODEC.quantise

    def counted(a, **kw):
        calls.append(kw["step"])
        return real(a, **kw)

    monkeypatch.setattr(CODEC, "quantise", counted)
    return calls


@pytest.mark.parametrize("target", [("psnr", 34.0), ("bpp", 1.0), ("ssim", 0.95)])
def test_a_target_takes_a_few_trials_not_a_bisection(monkeypatch, astronaut, target):
    # scikit-image's 'astronaut'; a bisection over the step range took 16 trials
    calls = _counting_quantise(monkeypatch)
    r = _enc(astronaut, target=target)
    assert r.target_met
    assert len(calls) <= 7


def test_the_chosen_trial_is_not_quantised_or_coded_again(monkeypatch, chelsea):
    from workbench.codecs.klt import CODEC

    calls = _counting_quantise(monkeypatch)
    coded = []
    real = CODEC.serialise
    monkeypatch.setattr(CODEC, "serialise", lambda c: coded.append(c.step) or real(c))
    r = _enc(chelsea, target=("bpp", 1.0))
    assert len(coded) == len(set(coded)) == len(calls) == len(set(calls))
    assert np.float32(r.step) in {np.float32(s) for s in calls}


def test_a_search_for_a_verdict_brackets_its_threshold_within_two_percent():
    step, ok = ratecontrol.search_step(lambda s: 1.0 if s <= 37.0 else 0.0, "pass", 0.5)
    assert ok and 37.0 / 1.02 <= step <= 37.0


def test_a_rate_search_finds_the_finest_step_within_the_rate():
    # a rate falling as 1/step: the step for 0.5 is 2.0
    step, ok = ratecontrol.search_step(lambda s: 1.0 / s, "bpp", 0.5)
    assert ok and 1.0 / step <= 0.5 and step == pytest.approx(2.0, rel=0.011)
