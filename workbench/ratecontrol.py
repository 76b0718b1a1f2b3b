"""Rate control: the quantiser step that just meets a PSNR, SSIM, rate or pass/fail target,
in a few trial encodes. The same search serves the CLI, the app's target modes, the sheet and
``--block auto``; what a trial costs is up to the caller's ``evaluate``."""

from __future__ import annotations

import numpy as np

STEP_RANGE = (0.05, 1024.0)

# How close to the target the search stops: PSNR in dB, SSIM as -log(1 - SSIM) (1 % of the
# distance from 1), rate as log(bpp) (1 %); or when the step is known within 0.5 % (2 % for
# a pass/fail verdict); or after MAX_TRIALS. Quality is not strictly monotone in the step at that scale
# (a component kept or dropped flips the value), so a finer search only chases that noise.
SEARCH_TOLERANCE = {"psnr": 0.02, "ssim": 0.01, "bpp": 0.01}
RESOLUTION = {"pass": np.log(1.02)}
FINE_RESOLUTION = np.log(1.005)
MAX_TRIALS = 10
MAX_JUMP = 2.0  # at most a factor e**2 in step per trial before the target is bracketed
# Typical slopes of the searched quantity against log(step), for the first trial: 6 dB per
# halving of the step (common practice for a uniform quantiser at high rate), and about
# 0.7 for log(bpp) and -log(1 - SSIM) (from our own curves on scikit-image's photographs).
FIRST_SLOPE = {"psnr": -8.7, "ssim": -0.7, "bpp": -0.7, "pass": -1.0}


def _scaled(kind: str, v: float) -> float:
    """The searched quantity on a scale where it is close to linear in log(step), growing
    with quality (so that meeting the target is ``scaled >= scaled(target)``)."""
    if kind == "ssim":
        return -np.log(max(1.0 - v, 1e-12))
    if kind == "bpp":
        return -np.log(max(v, 1e-12))
    return float(v)


def search_step(evaluate, kind: str, target: float, lo: float = STEP_RANGE[0], hi: float = STEP_RANGE[1],
                start: float = 8.0):
    """The step that just meets a target, in few trials; quality and rate both fall as the
    step grows.

    For ``psnr``/``ssim`` (and ``pass``, a 0/1 verdict with target 0.5): the largest
    (cheapest) step whose value stays at or above ``target``. For ``bpp``: the smallest
    (best) step whose rate stays at or below it. Each trial costs a real quantisation, so
    the search is a safeguarded secant on log(step) from ``start``: an extrapolating step
    until the target is bracketed, then false position (Illinois) inside the bracket, with
    bisection where the function is infinite or a verdict. It stops at a meeting step
    within :data:`SEARCH_TOLERANCE` of the target, when the bracket is narrower than
    :data:`FINE_RESOLUTION`, or after :data:`MAX_TRIALS` trials.

    Returns
    -------
    step : float
    met : bool
        False when no step in range meets the target (the closest end is returned).
    """
    # u is log(step), negated for a rate target so that the meeting side is always the low one
    sign = -1.0 if kind == "bpp" else 1.0
    ulo, uhi = sorted((sign * np.log(lo), sign * np.log(hi)))
    width = RESOLUTION.get(kind, FINE_RESOLUTION)
    want = _scaled(kind, target)
    tol = SEARCH_TOLERANCE.get(kind, 0.0)
    seen: dict[float, float] = {}

    def gap(u: float) -> float:
        if u not in seen:
            v = evaluate(float(np.exp(sign * u)))
            seen[u] = (1.0 if v >= target else -1.0) if kind == "pass" else _scaled(kind, v) - want
        return seen[u]

    a = b = None  # the largest log-step known to meet, the smallest known to miss
    slope, last = FIRST_SLOPE.get(kind, -1.0), None
    u = float(np.clip(sign * np.log(start), ulo, uhi))
    stayed = {True: 0, False: 0}  # trials in a row that left the meeting (True) or missing end in place
    while True:
        d = gap(u)
        # the coarsest trial that met, and the finest beyond it that missed (quality is not
        # strictly monotone: a coarser trial that meets moves the bracket on)
        a = max((x for x, g in seen.items() if g >= 0), default=None)
        b = min((x for x, g in seen.items() if g < 0 and (a is None or x > a)), default=None)
        if last is not None and np.isfinite(d) and np.isfinite(last[1]) and u != last[0] and kind != "pass":
            s = (d - last[1]) / (u - last[0])
            slope = s if s < 0 else slope
        last = (u, d)
        if a is None or b is None:  # not bracketed yet: extrapolate, at most MAX_JUMP
            if a is not None and len(seen) >= MAX_TRIALS:
                break
            if a is None and u <= ulo:
                return float(np.exp(sign * ulo)), False
            if b is None and u >= uhi:
                return float(np.exp(sign * uhi)), True
            move = -d / slope if np.isfinite(d) else (MAX_JUMP if d > 0 else -MAX_JUMP)
            move = float(np.clip(move * 1.1, -MAX_JUMP, MAX_JUMP))  # a little past the target
            if abs(move) < 0.01:
                move = 0.01 if d >= 0 else -0.01
            u = float(np.clip((a if d >= 0 else u) + move, ulo, uhi))
            continue
        da, db = seen[a], seen[b]
        if (kind != "pass" and da <= tol) or b - a <= width or len(seen) >= MAX_TRIALS:
            break
        if kind == "pass" or not (np.isfinite(da) and np.isfinite(db)):
            u = 0.5 * (a + b)
        else:
            # Illinois: an end left in place by two trials in a row counts half as much
            target_gap = 0.5 * tol  # aim just inside the meeting side
            fa = (da - target_gap) * 0.5 ** max(0, stayed[True] - 1)
            fb = (db - target_gap) * 0.5 ** max(0, stayed[False] - 1)
            u = a + (b - a) * fa / (fa - fb) if fa != fb else 0.5 * (a + b)
            u = float(np.clip(u, a + 0.02 * (b - a), b - 0.02 * (b - a)))
        moved_a = gap(u) >= 0
        stayed[moved_a] = 0
        stayed[not moved_a] += 1
        last = None  # inside a bracket the slope comes from its ends
    return float(np.exp(sign * a)), True
