"""Bjøntegaard delta rate (G. Bjøntegaard, "Calculation of average PSNR differences between
RD-curves", ITU-T SG16 Q.6 VCEG-M33, Austin, 2001).

Each curve is fitted with a cubic polynomial of log-rate as a function of quality; the
polynomials are integrated over the overlapping quality interval and the average
log-rate difference is turned into a percentage: negative means the test codec needs
fewer bits for the same quality.
"""

from __future__ import annotations

import numpy as np

from ..errors import InputError


def _prepare(rate, quality, what):
    r = np.asarray(rate, dtype=np.float64)
    q = np.asarray(quality, dtype=np.float64)
    keep = np.isfinite(r) & np.isfinite(q) & (r > 0)
    r, q = r[keep], q[keep]
    if r.size < 4:
        raise InputError(f"BD-rate needs at least 4 finite points for the {what} curve, got {r.size}")
    return np.log10(r), q


def bd_rate(rate_ref, quality_ref, rate_test, quality_test) -> float:
    """Average rate difference of ``test`` against ``ref`` at equal quality, in percent.

    Raises
    ------
    InputError
        With fewer than four points on a curve or no overlap in quality.
    """
    lr1, q1 = _prepare(rate_ref, quality_ref, "reference")
    lr2, q2 = _prepare(rate_test, quality_test, "test")
    lo, hi = max(q1.min(), q2.min()), min(q1.max(), q2.max())
    if not hi > lo:
        raise InputError("BD-rate: the two curves do not overlap in quality")
    p1 = np.polyfit(q1, lr1, 3)
    p2 = np.polyfit(q2, lr2, 3)
    i1, i2 = np.polyint(p1), np.polyint(p2)
    avg1 = (np.polyval(i1, hi) - np.polyval(i1, lo)) / (hi - lo)
    avg2 = (np.polyval(i2, hi) - np.polyval(i2, lo)) / (hi - lo)
    return float((10 ** (avg2 - avg1) - 1) * 100)
