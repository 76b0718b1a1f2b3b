"""Rate control: the step search meets its target at the lowest cost."""

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

