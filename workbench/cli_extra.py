"""Sub-commands that live with their own features (the quality sheet, training)."""

from __future__ import annotations

import sys
from pathlib import Path

from .cli import _add_codec_options, _progress, _read_inputs, _shared_from_args, command, settings_from_args
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
    _add_codec_options(p)
    p.set_defaults(func=cmd_sheet)


def cmd_sheet(a) -> int:
    from .imagefiles import list_inputs
    from .jobs import run
    from .sheet import sheet_job

    settings = settings_from_args(a)
    names = [n.strip() for n in a.baselines.split(",") if n.strip()]
    shared, ref = _shared_from_args(a)
    images, skipped = _read_inputs(a.inputs)
    out = Path(a.output)
    sources = set(list_inputs(a.inputs))
    if any(p.parent.resolve() == out.resolve() for p in sources):
        raise InputError(f"{out}: choose an output folder other than the source folder")
    sheet = run(sheet_job(images, settings, out, baseline_names=names, require_psnr=a.require_psnr,
                          require_ssim=a.require_ssim, shared=shared, shared_ref=ref, protect=sources,
                          skipped=skipped), _progress)
    t = sheet["totals"]
    print(f"wrote {out}/sheet.pdf, sheet.csv, sheet.json and bundle.wbundle "
          f"({t['bundle_bytes']:,} bytes for {t['images']} images, {100 * t['saving_vs_raw']:.1f} % smaller than raw)")
    for n, v in sheet["folder"]["bd_rate"].items():
        bd = v["psnr"]
        print(f"  BD-rate (PSNR) against {n}: {'n/a' if bd is None else f'{bd:+.1f} %'}")
    if sheet["target_search"]:
        ts = sheet["target_search"]
        print(f"  per-image search saves {100 * ts['saving_vs_one_step']:.1f} % against one step for all images")
    return 0 if t["passed"] in (None, t["images"]) else 1
