"""The quality sheet: what a folder became, compared fairly with the standard codecs.

``sheet_job`` writes into one folder: ``bundle.wbundle`` (the compressed folder),
``sheet.pdf``, ``sheet.csv`` and ``sheet.json``. Every per-image number is measured on
the pixels decoded back from the saved bundle, never estimated. Rate–distortion curves
give one point per setting, each the size of a real file (ours: a one-image bundle;
baselines: the file Pillow wrote), and BD-rates follow VCEG-M33 (:mod:`workbench.quality.bdrate`).
"""

from __future__ import annotations

import csv
import datetime as _dt
import hashlib
import importlib.metadata as md
import io
import json
from concurrent.futures import as_completed
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from . import archive, jobs, pipeline, sheetpdf
from .quality import baselines, bdrate, metrics
from .version import __version__
from .quality import measures as _measures
from .errors import InputError
from .formats.imagefiles import SourceImage, write_all_atomic
from .jobs import Progress
from .notices import CAUTION
from .settings import Settings

TILE = 32
WORST_CROPS = 6
SWEEP_POINTS = 4  # Bjøntegaard's method fits a cubic through four points per curve (VCEG-M33)
WORKERS = 2
CURVE_WEIGHT = 12.0  # one image's curves cost about twelve of its encodes (ours and the baselines')
TARGET_WEIGHT = 2.0
LIBRARIES = ("numpy", "scipy", "Pillow", "scikit-image", "opencv-python-headless", "constriction", "numba",
             "matplotlib")


@dataclass
class ImageRow:
    name: str
    width: int
    height: int
    bits: int
    bytes: float
    bpp: float
    ratio: float
    psnr: float
    ssim: float
    worst_tile_psnr: float
    worst_tile_x: int
    worst_tile_y: int
    step: float
    passed: bool | None
    curves: dict = field(default_factory=dict)
    bd: dict = field(default_factory=dict)
    jpeg_bytes_at_floor: float | None = None
    target_met: bool | None = None
    measured: object | None = None  # measures.Outcome of the saved reconstruction
    own_bytes: int = 0  # payload + alpha; ``bytes`` = own_bytes + a pixel share of headers and shared side
    safe: dict | None = None  # the lowest-rate point of our curve from which every check holds

    def table(self) -> dict:
        t = {"name": self.name, "width": self.width, "height": self.height, "bits": self.bits,
             "bytes": self.own_bytes, "shared_bytes": round(self.bytes - self.own_bytes, 1), "bpp": self.bpp, "ratio": self.ratio, "psnr": self.psnr,
             "ssim": self.ssim, "worst_tile_psnr": self.worst_tile_psnr, "worst_tile_x": self.worst_tile_x,
             "worst_tile_y": self.worst_tile_y, "step": self.step, "pass": self.passed}
        if self.measured is not None:
            t["measures_ok"] = self.measured.ok
            t["safe_bpp"] = None if self.safe is None else self.safe["bpp"]
            t["safe_step"] = None if self.safe is None else self.safe["knob"]
            for name, values in self.measured.values.items():
                t.update({f"{name}.{k}": v for k, v in values.items()})
        return t


def _versions() -> dict:
    out = {"workbench": __version__}
    for name in LIBRARIES:
        try:
            out[name] = md.version(name)
        except md.PackageNotFoundError:
            out[name] = None
    return out


PROBES = (25, 75)
MAX_ROUNDS = 2
MAX_QUALITY = 95  # above this the quality knobs approach lossless (AVIF 100 is), off any curve


def _baseline_curve(b: baselines.Baseline, pixels: np.ndarray, lo: float, hi: float, ssim_ref) -> list:
    """SWEEP_POINTS points, one per target rate, whose rates span our curve's [lo, hi] (with a
    margin) so the curves overlap where BD-rate is computed; targets spaced geometrically.

    JPEG 2000's knob is a compression ratio, set directly. For the quality knobs two probe
    files are made first; when they show that the top target needs a knob above
    MAX_QUALITY, that knob's rate becomes the top target. Then, for the targets no file lies
    within 20 % of yet, the knob is interpolated in (log rate, knob) between the files so
    far (the end segments extended), for at most MAX_ROUNDS rounds.
    """
    targets = np.geomspace(0.6 * lo, 1.6 * hi, SWEEP_POINTS)
    if b.name == "jpeg2000":
        raw_bpp = 8 * pixels.itemsize * (1 if pixels.ndim == 2 else pixels.shape[2])
        knobs = sorted({round(float(raw_bpp / t), 2) for t in targets if raw_bpp / t > 1.0}, reverse=True)
        return baselines.sweep(b, pixels, knobs, ssim_ref=ssim_ref)
    pts = [baselines.point(b, pixels, k, ssim_ref=ssim_ref) for k in PROBES]
    tried = {p.knob for p in pts}
    known = sorted(pts, key=lambda p: p.bpp)
    if _interp_knob(np.log(targets[-1]), np.log([p.bpp for p in known]), np.array([p.knob for p in known], float)) \
            > MAX_QUALITY:
        # our curve reaches rates this codec cannot (below MAX_QUALITY): end the targets there
        top = baselines.point(b, pixels, MAX_QUALITY, ssim_ref=ssim_ref)
        pts.append(top)
        tried.add(top.knob)
        if top.bpp > targets[0]:
            targets = np.geomspace(targets[0], top.bpp, SWEEP_POINTS)
    for _ in range(MAX_ROUNDS):
        missing = [t for t in targets if not any(abs(np.log(p.bpp / t)) < np.log(1.2) for p in pts)]
        if not missing:
            break
        known = sorted(pts, key=lambda p: p.bpp)
        rates, knobs = np.log([p.bpp for p in known]), np.array([p.knob for p in known], float)
        for t in missing:
            k = int(np.clip(round(_interp_knob(np.log(t), rates, knobs)), 1, MAX_QUALITY))
            if k not in tried:
                tried.add(k)
                pts.append(baselines.point(b, pixels, k, ssim_ref=ssim_ref))
    # The curve is the point nearest each target (the others were only the search), so the
    # i-th point of every image's curve means the same thing for the folder curves.
    return [min(pts, key=lambda p: abs(np.log(p.bpp / t))) for t in targets]


def _interp_knob(log_rate: float, rates: np.ndarray, knobs: np.ndarray) -> float:
    """Knob at ``log_rate`` on the polyline through (rates, knobs), ends extended linearly."""
    if len(rates) < 2 or rates[-1] == rates[0]:
        return float(knobs[0])
    i = int(np.clip(np.searchsorted(rates, log_rate), 1, len(rates) - 1))
    r0, r1, k0, k1 = rates[i - 1], rates[i], knobs[i - 1], knobs[i]
    return float(k0 + (log_rate - r0) * (k1 - k0) / (r1 - r0)) if r1 != r0 else float(k0)


def _bd(ref_pts, test_pts, key) -> float | None:
    """BD-rate of ``test`` against ``ref``; the reference is limited to the rates the test
    curve spans (with a margin) so the cubic fits describe the same region."""
    # finite values, one point per rate (a target no knob could reach repeats a point)
    ref_pts = list({p["bpp"]: p for p in ref_pts if np.isfinite(p[key])}.values())
    test_pts = list({p["bpp"]: p for p in test_pts if np.isfinite(p[key])}.values())
    if not ref_pts or not test_pts:
        return None
    lo, hi = min(p["bpp"] for p in test_pts), max(p["bpp"] for p in test_pts)
    near = [p for p in ref_pts if 0.5 * lo <= p["bpp"] <= 2 * hi]
    if len(near) >= 4:
        ref_pts = near
    try:
        return bdrate.bd_rate([p["bpp"] for p in ref_pts], [p[key] for p in ref_pts],
                              [p["bpp"] for p in test_pts], [p[key] for p in test_pts])
    except InputError:
        return None


def _jpeg_bytes_meeting(img: SourceImage, kind: str, floor: float) -> float | None:
    """Smallest Pillow JPEG (bisection on quality) whose PSNR/SSIM reaches ``floor``."""
    b = baselines.get("jpeg")
    if not baselines.supports(b, img.pixels):
        return None
    lo, hi = 1, 100
    best = None
    while lo <= hi:
        q = (lo + hi) // 2
        p = baselines.point(b, img.pixels, q, with_ssim=(kind == "ssim"))
        value = p.psnr if kind == "psnr" else p.ssim
        if value >= floor:
            best, hi = p.bytes, q - 1
        else:
            lo = q + 1
    return best


def _curves_in_worker(name, pixels, settings_dict, names, shared_bytes, shared_ref, measure_spec=None,
                      saved=None) -> dict:
    """Process-pool entry: rebuild what cannot travel cheaply (the shared side) and run
    :func:`_curves`. Pillow's encoders and our coder hold the GIL, so threads would not help."""
    import cv2

    from . import codecs

    from .runtime import tune_allocator

    cv2.setNumThreads(1)  # one image per process already fills the cores
    tune_allocator()
    settings = Settings.from_dict(settings_dict)
    shared = None if shared_bytes is None else codecs.get(settings.method).shared_from_bytes(shared_bytes)
    return _curves(SourceImage(name, pixels), settings, names, shared, shared_ref, measure_spec, saved)


def _curves(img: SourceImage, settings: Settings, names, shared, shared_ref, measure_spec=None, saved=None) -> dict:
    """Our curve and each baseline's for one image; with ``measure_spec``, our points are
    measured (until the first that fails) and so is ``saved``, the bundle's own reconstruction
    (under the key ``saved_measured``), by the one reference made of the original here."""
    ours_settings = settings.replace(target=None)
    ref = metrics.SSIMReference(img.pixels, data_range=img.peak) if metrics.ssim_applies(img.height, img.width) else None
    mref = None if measure_spec is None else _measures.Reference(_measures.parse(*measure_spec), img.pixels, img.peak)
    pts = pipeline.rd_points(img, ours_settings, None, shared=shared, shared_ref=shared_ref, ssim_ref=ref,
                             measure_ref=mref, measure_until_failure=True)
    curves = {"ours": [{"bpp": p.bpp, "psnr": p.psnr, "ssim": p.ssim, "bytes": p.bytes, "knob": p.step,
                        **({} if p.measured is None else {"ok": p.measured.ok, "measures": p.measured.values})}
                       for p in pts]}
    if mref is not None and saved is not None:
        curves["saved_measured"] = mref.judge(saved)
    lo, hi = pts[0].bpp, pts[-1].bpp
    for n in names:
        b = baselines.get(n)
        if not baselines.supports(b, img.pixels):
            continue
        curves[n] = [{"bpp": p.bpp, "psnr": p.psnr, "ssim": p.ssim, "bytes": p.bytes, "knob": p.knob}
                     for p in _baseline_curve(b, img.pixels, lo, hi, ref)]
    return curves


def _finite(v):
    return None if v is None or not np.isfinite(v) else float(v)


def sheet_job(images: list[SourceImage], settings: Settings, outdir, *, baseline_names=("jpeg", "jpeg2000", "webp", "avif"),
              require_psnr: float | None = None, require_ssim: float | None = None, shared=None, shared_ref=None,
              protect=None, skipped=(), measures: tuple[str, list[str]] | None = None, target_measures: bool = False,
              reuse=()):
    """Generator job writing the bundle and the sheet into ``outdir``; returns the sheet dict.

    A bundle already made from these images with these settings (``outdir``'s own from an
    earlier sheet, or one of the files in ``reuse``, such as the bundle just saved) is
    decoded instead of encoded again (:func:`workbench.pipeline.reused`).

    ``measures`` is the text of the measurements and tolerances (:func:`workbench.quality.measures.parse`):
    run on every original and reconstruction of the curves, giving each image's safe point;
    with ``target_measures`` each image's step is searched for it.
    """
    if not images:
        raise InputError("no readable images to report on")
    chosen = None if measures is None else _measures.parse(*measures)
    names = [baselines.get(n).name for n in baseline_names]
    outdir = Path(outdir)
    # Progress in units of one image's encode, so the bar moves as the work does: the curves
    # (our steps and every baseline's files) are most of a sheet's time (measured, bench_sheet).
    count = len(images)
    searched = settings.target is not None and settings.target[0] in ("psnr", "ssim")
    at_decode, at_curves = 1.0 * count, 1.3 * count
    at_target = at_curves + CURVE_WEIGHT * count
    total = at_target + (TARGET_WEIGHT * count if searched else 0) + 0.5 * count
    result, reused_from = None, None
    if not target_measures:
        for candidate in [outdir / "bundle.wbundle", *map(Path, reuse)]:
            yield Progress(0, total, f"checking {candidate.name} for reuse")
            try:
                data = candidate.read_bytes() if candidate.is_file() else None
            except OSError:
                data = None
            result = None if data is None else pipeline.reused(data, images, settings, shared=shared,
                                                                shared_ref=shared_ref)
            if result is not None:
                reused_from = str(candidate)
                break
    if result is None:
        yield Progress(0, total, "encoding the bundle")
        result = yield from _scaled(pipeline.encode_job(images, settings, shared=shared, shared_ref=shared_ref,
                                                        measure=False, measures=chosen if target_measures else None,
                                                        target_measures=target_measures), 0, at_decode, total)
    digest = hashlib.sha256(result.data).hexdigest()
    if reused_from is None:
        yield Progress(at_decode, total, "decoding the saved bundle")
        _, decoded = pipeline.decode(result.data, shared=shared, shared_ref=shared_ref)
        fulls = [d.pixels for d in decoded]
    else:  # reused() decoded it already
        fulls = [r.reconstruction for r in result.images]
    rows: list[ImageRow] = []
    crops, saved = [], []  # the saved reconstructions are measured with the curves, in the workers
    for img, enc, full in zip(images, result.images, fulls):
        px = full[..., : img.pixels.shape[2]] if img.pixels.ndim == 3 else (
            full if full.ndim == 2 else full[..., 0])
        p = metrics.psnr(img.pixels, px, data_range=img.peak)
        s = metrics.ssim(img.pixels, px, data_range=img.peak) if metrics.ssim_applies(img.height, img.width) else float("nan")
        tiles = metrics.tile_psnr(img.pixels, px, tile=TILE, data_range=img.peak)
        wx, wy, wp = tiles.worst(1)[0]
        ok = None
        if require_psnr is not None or require_ssim is not None:
            ok = (require_psnr is None or p >= require_psnr) and (require_ssim is None or s >= require_ssim)
        rows.append(ImageRow(img.name, img.width, img.height, img.bits, enc.bytes, enc.bpp, enc.ratio, p, s,
                             wp, wx, wy, enc.step, ok, target_met=enc.target_met,
                             own_bytes=enc.own_bytes))
        crops.append((wp, img, px, wx, wy))
        saved.append(px if chosen is not None else None)
    yield Progress(at_curves, total, "rate–distortion curves")
    shared_bytes = None if shared is None else pipeline.codecs.get(settings.method).shared_to_bytes(shared)
    # forkserver: workers start clean, which is safe from inside the GUI's threads too.
    pool = jobs.pool(WORKERS, "forkserver")
    with pool:
        futures = {pool.submit(_curves_in_worker, img.name, img.pixels, settings.to_dict(), list(names),
                               shared_bytes, shared_ref, measures, px): row
                   for img, row, px in zip(images, rows, saved)}
        try:
            for i, fut in enumerate(as_completed(futures)):
                row = futures[fut]
                row.curves = fut.result()
                row.measured = row.curves.pop("saved_measured", None)
                if chosen is not None:
                    row.safe = _measures.safe_point(row.curves["ours"])
                for n in names:
                    if n in row.curves:
                        row.bd[n] = {"psnr": _bd(row.curves[n], row.curves["ours"], "psnr"),
                                     "ssim": _bd(row.curves[n], row.curves["ours"], "ssim")}
                yield Progress(at_curves + CURVE_WEIGHT * (i + 1), total, f"curves for {row.name}")
        except GeneratorExit:
            pool.shutdown(wait=False, cancel_futures=True)
            raise
    search = None
    if searched:
        yield Progress(at_target, total, "comparing with one step for all images")
        search = _target_summary(images, settings, rows, shared, shared_ref)
    folder = _folder_curves(rows, names)
    sheet = {
        "title": "workbench quality sheet",
        "date": _dt.datetime.now().astimezone().isoformat(timespec="seconds"),
        "versions": _versions(),
        "settings": settings.own(),
        "settings_text": settings.describe(),
        "bundle": {"file": "bundle.wbundle", "bytes": len(result.data), "sha256": digest, "reused_from": reused_from},
        "floors": {"psnr": require_psnr, "ssim": require_ssim},
        "totals": {"images": len(rows), "pixels": int(sum(r.width * r.height for r in rows)),
                   "raw_bytes": float(sum(r.width * r.height * (3 if img.channels == 3 else 1) * img.bits / 8
                                          for r, img in zip(rows, images))),
                   "bundle_bytes": len(result.data),
                   "passed": None if rows[0].passed is None else int(sum(bool(r.passed) for r in rows))},
        "images": [dict(r.table(), bd_rate=r.bd) for r in rows],
        "curves": {r.name: r.curves for r in rows},
        "folder": folder,
        "target_search": search,
        "advice": {r.name: r.advice for r in result.images if r.advice},
        "safe_point": None if chosen is None else _safe_summary(chosen, rows),
        "skipped": [{"name": n, "reason": why} for n, why in skipped],
        "caution": CAUTION,
    }
    sheet["totals"]["saving_vs_raw"] = 1 - sheet["totals"]["bundle_bytes"] / sheet["totals"]["raw_bytes"]
    yield Progress(total - 0.5 * count, total, "writing the PDF")
    crops.sort(key=lambda c: c[0])
    # All four files are staged before any is renamed, the JSON (which holds the bundle's
    # SHA-256) last: a failure or a kill leaves the old set, or a new bundle the old JSON disowns.
    kind = None if shared_ref is None else settings.traits.shared_kind
    recipe = archive.make_recipe(settings, kind, shared_ref)
    write_all_atomic([(outdir / "bundle.wbundle", result.data), (outdir / "sheet.csv", _csv(rows)),
                      (outdir / "recipe.wrecipe", archive.recipe_bytes(recipe)),
                      (outdir / "sheet.pdf", sheetpdf.render(sheet, rows, crops[:WORST_CROPS], TILE)),
                      (outdir / "sheet.json", json.dumps(_jsonable(sheet), indent=1).encode())], protect=protect)
    yield Progress(total, total, "done")
    return sheet


def _safe_summary(chosen, rows) -> dict:
    """Per image and for the folder: the lowest swept rate from which every check holds."""
    per = {r.name: None if r.safe is None else {"bpp": r.safe["bpp"], "step": r.safe["knob"], "psnr": r.safe["psnr"]}
           for r in rows}
    safe = [v for v in per.values() if v is not None]
    return {"checks": [f"{m.name}: {c.text()}" for m in chosen for c in m.checks], "per_image": per,
            "images_safe": len(safe), "folder_bpp": max(v["bpp"] for v in safe) if len(safe) == len(rows) else None,
            "limits": [{"measure": m.name, "key": c.key, "limit": c.limit, "kind": c.kind, "ideal": c.ideal}
                       for m in chosen for c in m.checks]}


def _scaled(job, a, b, total):
    """Run a sub-job, mapping its progress into [a, b] of ``total``."""
    try:
        while True:
            p = next(job)
            yield Progress(a + (b - a) * p.fraction, total, p.text)
    except StopIteration as stop:
        return stop.value


def _jsonable(o):
    if isinstance(o, dict):
        return {k: _jsonable(v) for k, v in o.items()}
    if isinstance(o, (list, tuple)):
        return [_jsonable(v) for v in o]
    if isinstance(o, (float, np.floating)):
        return _finite(o) if not (o == float("inf")) else "inf"
    if isinstance(o, np.integer):
        return int(o)
    return o


def _csv(rows) -> bytes:
    buf = io.StringIO()
    w = csv.writer(buf)
    header = list(rows[0].table())
    w.writerow(header)
    for r in rows:
        w.writerow([("" if v is None else v) for v in r.table().values()])
    return buf.getvalue().encode()


def _aggregate(subset, key) -> list[dict]:
    m = min(len(r.curves[key]) for r in subset)
    px = sum(r.width * r.height for r in subset)
    pts = [{"bpp": sum(8 * r.curves[key][i]["bytes"] for r in subset) / px,
            "psnr": float(np.mean([min(r.curves[key][i]["psnr"], 99.0) for r in subset])),
            "ssim": float(np.mean([r.curves[key][i]["ssim"] for r in subset]))} for i in range(m)]
    return sorted(pts, key=lambda p: p["bpp"])


def _folder_curves(rows, names) -> dict:
    """Folder-level curves: point i is the i-th point of every image's curve (ours: one
    step for all; a baseline: each image's i-th rate-matched knob), as total bits over
    total pixels and mean quality.

    Computed over the images that every compared codec can carry (16-bit images only go
    through JPEG 2000), so all curves describe the same pictures.
    """
    common = [r for r in rows if all(n in r.curves for n in names)]
    out = {"images": [r.name for r in common], "curves": {}, "bd_rate": {}}
    if not common:
        return out
    out["curves"]["ours"] = _aggregate(common, "ours")
    for n in names:
        out["curves"][n] = _aggregate(common, n)
        out["bd_rate"][n] = {"psnr": _bd(out["curves"][n], out["curves"]["ours"], "psnr"),
                             "ssim": _bd(out["curves"][n], out["curves"]["ours"], "ssim")}
    return out


def _target_summary(images, settings, rows, shared, shared_ref) -> dict:
    """Per-image cheapest step meeting the floor, against one step for every image and JPEG."""
    kind, floor = settings.target
    # Only images that can reach the floor at all are compared; the others are listed.
    pairs = [(img, r) for img, r in zip(images, rows) if r.target_met]
    unreachable = [r.name for r in rows if not r.target_met]
    if not pairs:
        return {"kind": kind, "floor": floor, "unreachable": unreachable, "tuned_bytes": None, "one_step": None,
                "one_step_bytes": None, "saving_vs_one_step": None, "jpeg_bytes": None, "saving_vs_jpeg": None,
                "per_image_jpeg_bytes": {}}
    met_images = [img for img, _ in pairs]
    one_step = min(r.step for _, r in pairs)
    uniform = pipeline.encode(met_images, settings.replace(target=None, step=one_step), shared=shared,
                              shared_ref=shared_ref, measure=False)
    tuned = pipeline.encode(met_images, settings, shared=shared, shared_ref=shared_ref, measure=False).size
    jpeg = [_jpeg_bytes_meeting(img, kind, floor) for img in met_images]
    jpeg_total = None if any(j is None for j in jpeg) else float(sum(jpeg))
    for (_, r), j in zip(pairs, jpeg):
        r.jpeg_bytes_at_floor = j
    return {"kind": kind, "floor": floor, "unreachable": unreachable, "tuned_bytes": tuned, "one_step": one_step,
            "one_step_bytes": uniform.size, "saving_vs_one_step": 1 - tuned / uniform.size,
            "jpeg_bytes": jpeg_total, "saving_vs_jpeg": None if jpeg_total is None else 1 - tuned / jpeg_total,
            "per_image_jpeg_bytes": {r.name: j for (_, r), j in zip(pairs, jpeg)}}
