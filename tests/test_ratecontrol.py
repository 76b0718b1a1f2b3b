"""Rate control: the step search meets its target at the lowest cost."""

import numpy as np
import pytest

from workbench import pipeline
from workbench.imagefiles import SourceImage
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
    step, ok = pipeline.search_step(lambda s: 100 - s, "psnr", 60.0)
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
