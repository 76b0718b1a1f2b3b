"""BD-rate (Bjøntegaard, VCEG-M33, 2001) against cases worked from its definition."""

import numpy as np
import pytest

from workbench.quality.bdrate import bd_rate
from workbench.errors import InputError

RATES = np.array([0.25, 0.5, 1.0, 2.0])
PSNR = np.array([30.0, 33.0, 36.0, 39.0])


def test_identical_curves_give_zero():
    assert bd_rate(RATES, PSNR, RATES, PSNR) == pytest.approx(0.0, abs=1e-9)


def test_uniform_rate_scaling_gives_exactly_that_percentage():
    # From the definition: log-rate shifted by log10(0.8) everywhere -> 10**shift - 1 = -20 %.
    assert bd_rate(RATES, PSNR, 0.8 * RATES, PSNR) == pytest.approx(-20.0, abs=1e-9)
    assert bd_rate(RATES, PSNR, 1.25 * RATES, PSNR) == pytest.approx(25.0, abs=1e-9)


def test_hand_worked_example_with_a_quality_shift():
    # Worked by hand: for this reference, log10(rate) is linear in PSNR, slope log10(2)/3
    # per dB. A test curve 1 dB better at every rate needs 2**(-1/3) of the rate: -20.63 %.
    assert bd_rate(RATES, PSNR, RATES, PSNR + 1.0) == pytest.approx((2 ** (-1 / 3) - 1) * 100, abs=1e-6)


def test_agrees_with_direct_numerical_integration():
    ref_r, ref_q = np.array([0.3, 0.6, 1.1, 2.3, 4.0]), np.array([29.0, 32.5, 35.1, 38.2, 40.6])
    t_r, t_q = np.array([0.25, 0.55, 0.9, 1.9, 3.1]), np.array([29.5, 33.0, 35.0, 38.5, 40.2])
    p1, p2 = np.polyfit(ref_q, np.log10(ref_r), 3), np.polyfit(t_q, np.log10(t_r), 3)
    q = np.linspace(29.5, 40.2, 20001)
    diff = np.trapezoid(np.polyval(p2, q) - np.polyval(p1, q), q) / (40.2 - 29.5)
    assert bd_rate(ref_r, ref_q, t_r, t_q) == pytest.approx((10**diff - 1) * 100, abs=1e-4)


def test_too_few_points_are_refused():
    with pytest.raises(InputError, match="at least 4"):
        bd_rate(RATES[:3], PSNR[:3], RATES, PSNR)


def test_disjoint_curves_are_refused():
    with pytest.raises(InputError, match="overlap"):
        bd_rate(RATES, PSNR, RATES, PSNR + 20)
