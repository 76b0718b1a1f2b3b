"""Measurements an image's owner makes, run on the original and on a reconstruction.

PSNR and SSIM say how far pixels moved; these say whether what is *measured* in the
image moved: how many spots and where, the area of the regions above a threshold, where
the edges lie, or a measurement of the user's own. Each :class:`Measure` finds its
objects once in the original (:meth:`Measure.find`) and then compares a reconstruction
with them (:meth:`Measure.compare`), giving named numbers; a :class:`Check` per number says
what change is tolerated. :func:`safe_point` finds the lowest rate at which every check
holds.

Built on scikit-image's detectors (``feature.blob_log``, ``filters.threshold_otsu``,
``measure.label``, ``feature.canny``) and scipy's assignment solver.
"""

from __future__ import annotations

import importlib.util
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..errors import InputError
from . import localdetect


@dataclass(frozen=True)
class Check:
    """A tolerance on one compared number: ``value <= limit`` ("max") or ``>= limit`` ("min")."""

    key: str
    limit: float
    kind: str = "max"
    ideal: float | None = None  # the value of a perfect reconstruction (0 for "max" checks)

    def fraction(self, values: dict) -> float:
        """How much of the tolerance a reconstruction uses: 0 = perfect, 1 = at the limit."""
        v = values.get(self.key, float("nan"))
        ideal = 0.0 if self.ideal is None and self.kind == "max" else self.ideal
        if ideal is None:  # a lower limit with no known ideal
            return self.limit / v if v else float("inf")
        span = abs(self.limit - ideal)
        return abs(v - ideal) / span if span else (0.0 if v == ideal else float("inf"))

    def holds(self, values: dict) -> bool:
        v = values.get(self.key)
        if v is None or not math.isfinite(v):
            return False
        return v <= self.limit if self.kind == "max" else v >= self.limit

    def text(self) -> str:
        return f"{self.key} {'<=' if self.kind == 'max' else '>='} {self.limit:g}"


def grey(pixels: np.ndarray, peak: float) -> np.ndarray:
    """Luma in [0, 1] (ITU-R BT.709 weights, as ``skimage.color.rgb2gray``) of grey or RGB pixels,
    in float32: the detectors filter float32 in about 60 % of float64's time, and 24 bits of
    mantissa hold a 16-bit source exactly."""
    a = np.asarray(pixels, dtype=np.float32) / np.float32(peak)
    if a.ndim == 3:
        a = a[..., :3] @ np.array([0.2125, 0.7154, 0.0721], np.float32)
    return a


class Measure:
    """Base of the built-in measurements; subclasses set ``name``, ``checks`` and both methods."""

    name = "measure"
    checks: tuple[Check, ...] = ()

    def find(self, pixels: np.ndarray, peak: float):
        raise NotImplementedError

    def compare(self, found, pixels: np.ndarray, peak: float) -> dict[str, float]:
        raise NotImplementedError

    def compare_marked(self, found, pixels: np.ndarray, peak: float):
        """``(compare's numbers, [(y, x, kind), ...])``: the items to draw over the views, from
        the same detection (none by default)."""
        return self.compare(found, pixels, peak), []


def match_points(a: np.ndarray, b: np.ndarray, radius: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """One-to-one matching of points ``a`` (N, 2) and ``b`` (M, 2) within ``radius``: as many
    pairs as possible, then the smallest total distance (the Hungarian method,
    ``scipy.optimize.linear_sum_assignment``, on each group of points linked by pairs within
    the radius: groups share no pair, so their optima make the whole's, and a textured frame's
    thousands of spots cost no N x M matrix).

    Returns
    -------
    ia, ib : index arrays of matched pairs, ``ia`` rising
    dist : their distances
    """
    a, b = np.asarray(a, float).reshape(-1, 2), np.asarray(b, float).reshape(-1, 2)
    empty = np.zeros(0, int)
    if len(a) == 0 or len(b) == 0:
        return empty, empty, np.zeros(0)
    from scipy.optimize import linear_sum_assignment
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components
    from scipy.spatial import cKDTree

    near = cKDTree(a).sparse_distance_matrix(cKDTree(b), radius * (1 + 1e-9) + 1e-12, output_type="ndarray")
    i, j = near["i"].astype(int), near["j"].astype(int)
    d = np.hypot(a[i, 0] - b[j, 0], a[i, 1] - b[j, 1])  # the same distances as the pairs' own
    keep = d <= radius
    i, j, d = i[keep], j[keep], d[keep]
    if not len(i):
        return empty, empty, np.zeros(0)
    n = len(a)
    graph = coo_matrix((np.ones(len(i)), (i, n + j)), shape=(n + len(b),) * 2)
    _, group = connected_components(graph, directed=False)
    g = group[i]
    order = np.argsort(g, kind="stable")
    i, j, d, g = i[order], j[order], d[order], g[order]
    groups = len(group)
    distinct_a = np.bincount(np.unique(g * n + i) // n, minlength=groups)
    distinct_b = np.bincount(np.unique(g * len(b) + j) // len(b), minlength=groups)
    star = (distinct_a == 1) | (distinct_b == 1)  # one point on a side: only one pair can be kept
    by_distance = np.lexsort((d, g))
    first = by_distance[np.r_[True, g[by_distance][1:] != g[by_distance][:-1]]]  # the nearest pair
    first = first[star[g[first]]]
    out_i, out_j, out_d = [i[first]], [j[first]], [d[first]]
    starts = np.flatnonzero(np.r_[True, g[1:] != g[:-1]])
    stops = np.r_[starts[1:], len(g)]
    general = ~star[g[starts]]
    for s0, s1 in zip(starts[general], stops[general]):
        gi, ri = np.unique(i[s0:s1], return_inverse=True)
        gj, rj = np.unique(j[s0:s1], return_inverse=True)
        cost = np.full((len(gi), len(gj)), radius * 1e6 + 1.0)  # no pair: never chosen if avoidable
        cost[ri, rj] = d[s0:s1]
        dist = np.full(cost.shape, np.inf)
        dist[ri, rj] = d[s0:s1]
        r, c = linear_sum_assignment(cost)
        ok = np.isfinite(dist[r, c])
        out_i.append(gi[r[ok]])
        out_j.append(gj[c[ok]])
        out_d.append(dist[r[ok], c[ok]])
    ia, ib, dist = np.concatenate(out_i), np.concatenate(out_j), np.concatenate(out_d)
    order = np.argsort(ia)
    return ia[order], ib[order], dist[order]


class Spots(Measure):
    """Bright blobs by the Laplacian of Gaussian (``skimage.feature.blob_log``), matched one to
    one within ``radius`` pixels: count change, missed, spurious, mean position shift."""

    name = "spots"

    def __init__(self, min_sigma: float = 1.0, max_sigma: float = 6.0, threshold: float = 0.05, radius: float = 3.0):
        self.params = dict(min_sigma=float(min_sigma), max_sigma=float(max_sigma), threshold=float(threshold))
        self.radius = float(radius)
        self.checks = (Check("count_error", 1), Check("shift_px", 0.5))

    def spots(self, pixels, peak) -> np.ndarray:
        """``blob_log``'s spot centres (y, x) in ``pixels``."""
        from skimage.feature import blob_log

        return blob_log(grey(pixels, peak), num_sigma=6, **self.params)[:, :2]

    def find(self, pixels, peak) -> localdetect.LogSpots:
        """The original's spots (``.blobs``), kept with what a reconstruction's detection needs
        to recompute only where it can differ."""
        return localdetect.LogSpots(grey(pixels, peak), num_sigma=6, **self.params)

    def compare(self, found, pixels, peak):
        return self._compare(found, pixels, peak, marks=False)[0]

    def compare_marked(self, found, pixels, peak):
        """The numbers, and ``(y, x, kind)`` per spot: ``matched``, ``missed`` (original only) or
        ``spurious``, from one detection in the reconstruction."""
        return self._compare(found, pixels, peak, marks=True)

    def _compare(self, found, pixels, peak, *, marks):
        test = found.detect(grey(pixels, peak))[:, :2]
        found = found.blobs[:, :2]
        ia, ib, dist = match_points(found, test, self.radius)
        values = {"count": float(len(found)), "count_rec": float(len(test)),
                  "count_error": float(abs(len(test) - len(found))), "missed": float(len(found) - len(ia)),
                  "spurious": float(len(test) - len(ia)), "shift_px": float(dist.mean()) if len(dist) else 0.0}
        if not marks:
            return values, []
        missed, spurious = np.ones(len(found), bool), np.ones(len(test), bool)
        missed[ia], spurious[ib] = False, False
        items = [(y, x, "matched") for y, x in found[ia].tolist()]
        items += [(y, x, "missed") for y, x in found[missed].tolist()]
        items += [(y, x, "spurious") for y, x in test[spurious].tolist()]
        return values, items


class Regions(Measure):
    """Regions above a threshold (Otsu's on the original unless given, placed midway across the
    gap in the original's values there; the reconstruction is cut at the same level), connected
    components of at least ``min_area`` pixels: count change, area change and the Dice overlap
    of the two masks."""

    name = "regions"

    def __init__(self, threshold: float | None = None, min_area: int = 4):
        self.threshold, self.min_area = threshold, int(min_area)
        self.checks = (Check("count_error", 1), Check("dice", 0.98, "min", 1.0))

    def _mask(self, g, level):
        from skimage.measure import label

        labels = label(g > level)
        sizes = np.bincount(labels.ravel())
        small = np.flatnonzero(sizes < self.min_area)
        mask = (labels > 0) & ~np.isin(labels, small[small > 0])
        return mask, int(np.count_nonzero(sizes[1:] >= self.min_area))

    def find(self, pixels, peak):
        from skimage.filters import threshold_otsu

        g = grey(pixels, peak)
        if self.threshold is not None:
            level = float(self.threshold)
        elif np.ptp(g) == 0:
            level = float(g.flat[0])
        else:
            # Otsu's level t splits g <= t from g > t; on images with few grey levels t sits on a
            # level itself, where a reconstruction's smallest deviation flips pixels. Cut midway
            # across the gap in the original's values at t instead (the same split of the original).
            t = float(threshold_otsu(g))
            level = 0.5 * (g[g <= t].max() + g[g > t].min())
        mask, count = self._mask(g, level)
        return level, mask, count

    def compare(self, found, pixels, peak):
        level, mask, count = found
        test, n = self._mask(grey(pixels, peak), level)
        inter, total = np.count_nonzero(mask & test), np.count_nonzero(mask) + np.count_nonzero(test)
        dice = 1.0 if total == 0 else 2.0 * inter / total
        area = np.count_nonzero(mask)
        return {"count": float(count), "count_rec": float(n), "count_error": float(abs(n - count)),
                "area_change": float((np.count_nonzero(test) - area) / max(area, 1)), "dice": dice}


class Edges(Measure):
    """Canny edge maps (``skimage.feature.canny``) compared within ``tolerance`` pixels: the
    F-score of the reconstruction's edges against the original's (precision and recall)."""

    name = "edges"

    def __init__(self, sigma: float = 2.0, tolerance: float = 1.5):
        self.sigma, self.tolerance = float(sigma), float(tolerance)
        self.checks = (Check("f_score", 0.9, "min", 1.0),)

    def find(self, pixels, peak) -> localdetect.CannyEdges:
        """The original's edge map (``.edges``), kept with what a reconstruction's detection
        needs to recompute only where it can differ."""
        return localdetect.CannyEdges(grey(pixels, peak), sigma=self.sigma)

    def compare(self, found, pixels, peak):
        ref = found.edges
        test = found.detect(grey(pixels, peak))
        if not ref.any() and not test.any():
            p = r = 1.0
        elif not ref.any() or not test.any():
            p = r = 0.0
        else:
            p = float(np.mean(within(ref, test, self.tolerance)))
            r = float(np.mean(within(test, ref, self.tolerance)))
        f = 0.0 if p + r == 0 else 2 * p * r / (p + r)
        return {"edges": float(ref.sum()), "precision": p, "recall": r, "f_score": f}


def within(marks: np.ndarray, at: np.ndarray, radius: float) -> np.ndarray:
    """For each true pixel of ``at`` (in raster order), whether a true pixel of ``marks`` lies
    within Euclidean distance ``radius``: what ``distance_transform_edt(~marks)[at] <= radius``
    says, looked up only at those pixels."""
    ys, xs = np.nonzero(at)
    h, w = marks.shape
    k = int(math.floor(radius))
    out = np.zeros(len(ys), bool)
    for dy in range(-k, k + 1):
        for dx in range(-k, k + 1):
            if dy * dy + dx * dx > radius * radius:
                continue
            y, x = ys + dy, xs + dx
            inside = (y >= 0) & (y < h) & (x >= 0) & (x < w)
            hit = np.zeros(len(ys), bool)
            hit[inside] = marks[y[inside], x[inside]]
            out |= hit
    return out


class UserFile(Measure):
    """A measurement of the user's own: a Python file defining ``measure(pixels) -> dict``
    of named numbers. Each number's relative change is compared with ``tolerance``.

    This runs the file's code with the user's own rights, like any script they run; it is
    only ever loaded from a path the user gives, never from a bundle or a sheet.
    """


    def __init__(self, path, tolerance: float = 0.01):
        path = Path(path)
        spec = importlib.util.spec_from_file_location(f"workbench_user_measure_{path.stem}", path)
        if spec is None or not path.is_file():
            raise InputError(f"{path}: no such measurement file")
        module = importlib.util.module_from_spec(spec)
        try:
            spec.loader.exec_module(module)
        except Exception as exc:  # noqa: BLE001 - the user's code: report, do not crash
            raise InputError(f"{path}: the measurement file failed to load ({type(exc).__name__}: {exc})") from None
        if not callable(getattr(module, "measure", None)):
            raise InputError(f"{path}: defines no function measure(pixels) -> dict")
        self.path, self.fn, self.name = path, module.measure, path.stem
        self.checks = (Check("worst_change", float(tolerance)),)

    def _run(self, pixels) -> dict[str, float]:
        try:
            out = self.fn(np.array(pixels))
            values = {str(k): float(v) for k, v in dict(out).items()}
        except Exception as exc:  # noqa: BLE001
            raise InputError(f"{self.path}: measure() failed ({type(exc).__name__}: {exc})") from None
        return values

    def find(self, pixels, peak):
        return self._run(pixels)

    def compare(self, found, pixels, peak):
        test = self._run(pixels)
        out = {}
        worst = 0.0
        for k, v in found.items():
            t = test.get(k, float("nan"))
            change = abs(t - v) / max(abs(v), 1e-12)
            out[k], out[f"{k}_rec"], out[f"{k}_change"] = v, t, change
            worst = max(worst, change) if math.isfinite(change) else float("inf")
        out["worst_change"] = worst
        return out


BUILTIN = {"spots": Spots, "regions": Regions, "edges": Edges}


def parse(spec: str, tolerances: list[str] = ()) -> list[Measure]:
    """Measurements from ``"spots,regions,edges,FILE.py"`` and tolerances ``["spots.shift_px<=0.3", ...]``.

    A tolerance names a measurement, one of its numbers, ``<=`` or ``>=`` and a limit; it
    replaces that measurement's default checks on the same number.
    """
    out = []
    for item in [s.strip() for s in spec.split(",") if s.strip()]:
        if item in BUILTIN:
            out.append(BUILTIN[item]())
        elif item.endswith(".py"):
            out.append(UserFile(item))
        else:
            raise InputError(f"unknown measurement {item!r}; choose from {', '.join(BUILTIN)} or a FILE.py")
    by_name = {m.name: m for m in out}
    for t in tolerances:
        for op, kind in (("<=", "max"), (">=", "min")):
            if op in t:
                left, right = t.split(op, 1)
                break
        else:
            raise InputError(f"tolerance {t!r} must look like NAME.KEY<=LIMIT or NAME.KEY>=LIMIT")
        name, _, key = left.strip().partition(".")
        if name not in by_name or not key:
            raise InputError(f"tolerance {t!r} names no chosen measurement (chosen: {', '.join(by_name) or 'none'})")
        try:
            limit = float(right)
        except ValueError:
            raise InputError(f"tolerance {t!r}: {right.strip()!r} is not a number") from None
        m = by_name[name]
        ideal = next((c.ideal for c in m.checks if c.key == key), None)
        m.checks = tuple(c for c in m.checks if c.key != key) + (Check(key, limit, kind, ideal),)
    return out


@dataclass
class Outcome:
    """What every measurement said about one reconstruction."""

    values: dict[str, dict[str, float]]
    failed: list[str]  # "spots: shift_px <= 0.5" for each check that does not hold
    marks: list = field(default_factory=list)  # (y, x, kind) to draw, when asked for

    @property
    def ok(self) -> bool:
        return not self.failed

    def summary(self) -> str:
        parts = []
        for name, v in self.values.items():
            if "count" in v and "count_rec" in v:
                s = f"{name} {v['count']:.0f} → {v['count_rec']:.0f}"
                if "missed" in v:
                    s += f", {v['missed']:.0f} missed, {v['spurious']:.0f} spurious, shift {v['shift_px']:.2f} px"
                if "dice" in v:
                    s += f", Dice {v['dice']:.3f}"
                parts.append(s)
            elif "f_score" in v:
                parts.append(f"{name} F {v['f_score']:.3f}")
            else:
                parts.append(f"{name} worst change {100 * v.get('worst_change', float('nan')):.2f} %")
        return "; ".join(parts)


class Reference:
    """The measurements' findings on one original, ready to judge reconstructions of it."""

    def __init__(self, measures: list[Measure], pixels: np.ndarray, peak: float):
        self.measures, self.peak = list(measures), float(peak)
        self.found = [m.find(pixels, self.peak) for m in self.measures]

    def judge(self, pixels: np.ndarray, *, marks: bool = False) -> Outcome:
        """Every measurement on one reconstruction; with ``marks``, also the items to draw
        over the views (the spots' matched, missed and spurious), from the same detections."""
        values, failed, drawn = {}, [], []
        for m, f in zip(self.measures, self.found):
            if marks:
                v, items = m.compare_marked(f, pixels, self.peak)
                drawn += items
            else:
                v = m.compare(f, pixels, self.peak)
            values[m.name] = v
            failed += [f"{m.name}: {c.text()}" for c in m.checks if not c.holds(v)]
        return Outcome(values, failed, drawn)


def safe_point(points: list[dict]) -> dict | None:
    """The lowest-rate point from which every point of higher rate also passes.

    ``points``: dicts with ``bpp`` and ``ok``, any order; a point without ``ok`` (not
    measured) ends the run like a failure. ``None`` if the best point fails.
    """
    best = None
    for p in sorted(points, key=lambda p: -p["bpp"]):
        if not p.get("ok"):
            break
        best = p
    return best
