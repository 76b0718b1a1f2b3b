"""Sub-commands that live with their own features (the quality sheet, training)."""

from __future__ import annotations

import sys
from pathlib import Path

from .cliargs import (_add_codec_options, _progress, _read_inputs, _shared_from_args, command, measures_from_args,
                      resolve_block, settings_from_args)
from .errors import InputError


@command
def _sheet(sub):
    p = sub.add_parser("sheet", help="write the bundle and a quality sheet (PDF, CSV, JSON) into a folder")
    p.add_argument("inputs", nargs="+", metavar="INPUT")
    p.add_argument("-o", "--output", required=True, metavar="OUTDIR")
    p.add_argument("--baselines", default="jpeg,jpeg2000,webp,avif",
                   help="comma-separated standard codecs to compare with (default all four)")
    p.add_argument("--require-psnr", type=float, metavar="DB", help="mark images below this PSNR as failing")
    p.add_argument("--require-ssim", type=float, metavar="S", help="mark images below this SSIM as failing")
    p.add_argument("--reuse", action="append", default=[], metavar="BUNDLE",
                   help="take the bundle from this file when it was made from the same images with the same "
                        "settings, instead of encoding again (OUTDIR's own bundle is always checked)")
    _add_codec_options(p)
    p.set_defaults(func=cmd_sheet)


def cmd_sheet(a) -> int:
    from .formats.imagefiles import list_inputs
    from .jobs import run
    from .sheet import sheet_job

    settings = settings_from_args(a)
    measures_from_args(a)  # checked here, rebuilt from the text in each worker
    names = [n.strip() for n in a.baselines.split(",") if n.strip()]
    shared, ref = _shared_from_args(a)
    images, skipped = _read_inputs(a.inputs)
    if images:
        settings = resolve_block(a, settings, images)
    out = Path(a.output)
    sources = set(list_inputs(a.inputs))
    if any(p.parent.resolve() == out.resolve() for p in sources):
        raise InputError(f"{out}: choose an output folder other than the source folder")
    sheet = run(sheet_job(images, settings, out, baseline_names=names, require_psnr=a.require_psnr,
                          require_ssim=a.require_ssim, shared=shared, shared_ref=ref, protect=sources,
                          skipped=skipped, measures=(a.measure, list(a.tolerance)) if a.measure else None,
                          target_measures=a.target_measures, reuse=a.reuse), _progress())
    t = sheet["totals"]
    if sheet["bundle"]["reused_from"]:
        print(f"reused {sheet['bundle']['reused_from']} (same images, same settings) instead of encoding again")
    print(f"wrote {out}/sheet.pdf, sheet.csv, sheet.json, bundle.wbundle and recipe.wrecipe "
          f"({t['bundle_bytes']:,} bytes for {t['images']} images, {100 * t['saving_vs_raw']:.1f} % smaller than raw)")
    for n, v in sheet["folder"]["bd_rate"].items():
        bd = v["psnr"]
        print(f"  BD-rate (PSNR) against {n}: {'n/a' if bd is None else f'{bd:+.1f} %'}")
    for name, text in sheet["advice"].items():
        print(f"  {name}: {text}")
    safe = sheet.get("safe_point")
    if safe:
        print(f"  measurements within tolerance from {safe['folder_bpp']:.3f} bpp for every image "
              f"({safe['images_safe']} of {t['images']} images have a safe point on the swept curve)"
              if safe["folder_bpp"] is not None else
              f"  measurements: {safe['images_safe']} of {t['images']} images have a safe point on the swept curve")
    ts = sheet["target_search"]
    if ts and ts["tuned_bytes"] is not None:
        print(f"  per-image search saves {100 * ts['saving_vs_one_step']:.1f} % against one step for all images"
              + (f"; {100 * ts['saving_vs_jpeg']:.1f} % against JPEG at the same floor" if ts["jpeg_bytes"] else ""))
    if ts and ts["unreachable"]:
        print(f"  cannot reach the target at any step: {', '.join(ts['unreachable'])}")
    return 0 if t["passed"] in (None, t["images"]) else 1


@command
def _train(sub):
    p = sub.add_parser("train", help="train the conv encoder on a folder (CPU)")
    p.add_argument("inputs", nargs="+", metavar="INPUT")
    p.add_argument("-o", "--output", required=True, metavar="MODEL.wmodel")
    p.add_argument("--latent", type=int, default=192, metavar="C", help="latent channels (default 192)")
    p.add_argument("--hidden", type=int, default=64, help="channels inside the network (default 64)")
    p.add_argument("--side", type=int, default=48, metavar="S",
                   help="side-latent channels of the hyperprior entropy model, 0 for none (default 48)")
    p.add_argument("--distortion-weight", dest="lam", type=float, default=0.08, metavar="W",
                   help="weight of distortion against rate: larger = higher quality (default 0.08)")
    p.add_argument("--minutes", type=float, default=10.0, metavar="M", help="training time budget (default 10)")
    p.add_argument("--adapt", choices=("all", "synthesis"), default="all",
                   help="what fine-tuning changes: all weights (default), or the decoder and entropy model only "
                        "(the encoder stays the starting model's)")
    p.add_argument("--steps", type=int, help="stop after this many steps instead (for quick checks)")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--resume", action="store_true", help="continue from MODEL.wmodel and its .state file")
    p.add_argument("--start-from", default="shipped", metavar="MODEL",
                   help="weights to start from: 'shipped' (default; fine-tunes the packaged model when the "
                        "architecture matches), a .wmodel file, or 'none' for random weights")
    p.set_defaults(func=cmd_train)


def cmd_train(a) -> int:
    from .formats.imagefiles import list_inputs
    from .jobs import run
    from .training import TrainConfig, train_job

    if not (1 <= a.latent <= 1024 and 1 <= a.hidden <= 1024 and 0 <= a.side <= 1024):
        raise InputError("--latent and --hidden must be between 1 and 1024, --side between 0 and 1024")
    if not (a.lam > 0 and a.minutes > 0):
        raise InputError("--distortion-weight and --minutes must be positive")
    out = Path(a.output)
    if out.resolve() in {p.resolve() for p in list_inputs(a.inputs)}:
        raise InputError(f"{out}: refusing to overwrite a source image")
    images, _ = _read_inputs(a.inputs)
    start = None if a.start_from == "none" else a.start_from
    cfg = TrainConfig(latent=a.latent, hidden=a.hidden, side=a.side, side_hidden=a.hidden if a.side else 0,
                      lam=a.lam, minutes=a.minutes, seed=a.seed, max_steps=a.steps, start_from=start, adapt=a.adapt)
    r = run(train_job(images, out, cfg, resume=a.resume), _progress())
    last = r["history"][-1]
    print(f"wrote {out} after {r['steps']} steps (held-out {last['heldout_psnr']:.2f} dB at {last['heldout_bpp']:.3f} bpp), "
          f"sha256 {r['sha256'][:16]}…", file=sys.stdout)
    return 0
