"""Command line: ``workbench encode | decode | info | fit-basis | sheet | train | gui``.

Each command turns its flags into one :class:`~workbench.settings.Settings` and calls the
same core functions the GUI uses. Bad input ends with exit status 2 and one ``error:`` line.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from pathlib import Path

from .cliargs import (EPILOG, EXTRA_COMMANDS, _add_budget_option, _add_codec_options, _progress, _read_inputs,
                      _shared_from_args, measures_from_args, resolve_block, settings_from_args)
from .errors import Cancelled, WorkbenchError
from .settings import BLOCK_SIZES, Settings
from .version import __version__

def cmd_encode(a) -> int:
    from . import pipeline
    from .formats.imagefiles import list_inputs, write_atomic
    from .jobs import run

    settings = settings_from_args(a)
    shared, ref = _shared_from_args(a)
    images, _ = _read_inputs(a.inputs)
    chosen = measures_from_args(a)
    if images:
        settings = resolve_block(a, settings, images)
    job = pipeline.encode_job(images, settings, shared=shared, shared_ref=ref, embed=a.embed_model,
                              max_pixels=a.max_pixels, measures=chosen, target_measures=a.target_measures)
    result = run(job, _progress())
    write_atomic(a.output, result.data, protect=set(list_inputs(a.inputs)))
    if a.json:
        print(json.dumps({"bundle": str(a.output), "bytes": result.size,
                          "images": [{**{k: r.summary()[k] for k in ("name", "width", "height", "bpp", "psnr", "ssim")},
                                      **({} if r.measured is None else
                                         {"measures": r.measured.values, "measures_ok": r.measured.ok})}
                                     for r in result.images]}))
    else:
        for r in result.images:
            note = "" if r.target_met in (None, True) else "  (target not reached)"
            print(f"{r.name}: {r.width}x{r.height}  {r.bpp:.3f} bpp  PSNR {r.psnr:.2f} dB  SSIM {r.ssim:.4f}  "
                  f"step {r.step:.3g}{note}")
            if r.advice:
                print(f"    {r.advice}")
            if r.measured is not None:
                verdict = "within tolerance" if r.measured.ok else "OUT OF TOLERANCE: " + "; ".join(r.measured.failed)
                print(f"    {r.measured.summary()}  ({verdict})")
        print(f"wrote {a.output} ({result.size} bytes)")
    return 0


def cmd_decode(a) -> int:
    from . import pipeline
    from .formats.imagefiles import encode_png, write_all_atomic
    from .formats.names import output_paths

    from .formats import bundle

    data = _read_bundle(a.bundle)
    shared, ref = _shared_from_args(a, bundle.parse(data, max_pixels=a.max_pixels).settings.method)
    _, decoded = pipeline.decode(data, shared=shared, shared_ref=ref, max_pixels=a.max_pixels)
    out = Path(a.output)
    targets = [out / p for p in output_paths([d.name for d in decoded])]
    if not a.force:
        existing = [t for t in targets if t.exists()]
        if existing:
            raise WorkbenchError(f"{existing[0]} exists ({len(existing)} of {len(targets)} outputs do); "
                                 "choose another folder or pass --force")
    # Every PNG is staged before any is renamed into place: a full disk leaves OUTDIR as it was.
    write_all_atomic((t, encode_png(d.pixels)) for t, d in zip(targets, decoded))
    for t in targets:
        print(f"wrote {t}")
    return 0


def _read_bundle(path) -> bytes:
    try:
        return Path(path).read_bytes()
    except OSError as exc:
        raise WorkbenchError(f"{path}: cannot read ({exc.strerror})") from None


def cmd_info(a) -> int:
    from .formats import bundle

    c = bundle.parse(_read_bundle(a.bundle), max_pixels=a.max_pixels)
    info = {"bundle": str(a.bundle), "bytes": c.size, "tool": c.meta.get("tool"), "settings": c.settings.own(),
            "basis": "external " + c.basis_ref if c.basis_ref else ("shared in bundle" if c.shared else "per image"),
            "summary": c.settings.describe(),
            "images": [{"name": e.name, "width": e.width, "height": e.height, "bits": e.bits, "channels": e.channels,
                        "alpha": e.alpha is not None, "payload_bytes": len(e.payload), "sha256": e.checksum}
                       for e in c.entries]}
    if a.json:
        print(json.dumps(info))
        return 0
    s = c.settings
    n = len(c.entries)
    print(f"{a.bundle}: {c.size} bytes, {n} image{'' if n == 1 else 's'}, made by {info['tool']}")
    side = s.traits.shared_kind
    print(s.describe() + (f"; {side} {info['basis']}" if side and (c.basis_ref or c.shared) else ""))
    for e in info["images"]:
        print(f"  {e['name']}: {e['width']}x{e['height']} {e['bits']}-bit {e['channels']} ch"
              f"{' +alpha' if e['alpha'] else ''}, {e['payload_bytes']} bytes")
    return 0


def cmd_fit_basis(a) -> int:
    from . import pipeline
    from .formats.basisfile import save_basis
    from .codecs.klt import CODEC
    from .formats.imagefiles import list_inputs

    images, _ = _read_inputs(a.inputs)
    if not images:
        raise WorkbenchError("no readable images to fit a basis on")
    s = Settings(block=a.block, chroma=a.chroma, basis_scope="folder")
    basis, _, _ = CODEC.prepare_shared([pipeline.image_planes(i, s.chroma) for i in images], s)
    if Path(a.output).resolve() in {p.resolve() for p in list_inputs(a.inputs)}:
        raise WorkbenchError(f"{a.output}: refusing to overwrite a source image")
    digest = save_basis(a.output, basis, sources=[i.name for i in images])
    energy = basis.energy_kept()
    marks = ", ".join(f"K={k}: {100 * energy[k - 1]:.1f}%" for k in (1, 4, 16) if k <= len(energy))
    print(f"wrote {a.output} (block {a.block}, {len(images)} images, sha256 {digest[:16]}…; energy kept {marks})")
    return 0


def cmd_gui(a) -> int:
    from .gui.app import main as gui_main

    return gui_main(a.folder)


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="workbench", description="Compress image folders with a transform learned from "
                                "the folder itself, and measure what it costs.", epilog=EPILOG)
    p.add_argument("--version", action="version", version=f"workbench {__version__}")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    e = sub.add_parser("encode", help="compress images or folders into one bundle", epilog=EPILOG)
    e.add_argument("inputs", nargs="+", metavar="INPUT", help="image files or folders")
    e.add_argument("-o", "--output", required=True, metavar="OUT.wbundle")
    e.add_argument("--json", action="store_true", help="print one JSON object instead of text")
    _add_budget_option(e)
    _add_codec_options(e)
    e.set_defaults(func=cmd_encode)

    d = sub.add_parser("decode", help="decode a bundle into PNG files (16-bit PNG for 16-bit sources)")
    d.add_argument("bundle", metavar="BUNDLE")
    d.add_argument("-o", "--output", required=True, metavar="OUTDIR")
    d.add_argument("--basis", metavar="FILE", help="the .wbasis file the bundle was made with, if external")
    d.add_argument("--model", metavar="FILE", help="the .wmodel file the bundle was made with, if not the shipped one")
    d.add_argument("--force", action="store_true", help="replace existing files in OUTDIR")
    _add_budget_option(d)
    d.set_defaults(func=cmd_decode)

    i = sub.add_parser("info", help="describe a bundle without decoding it")
    i.add_argument("bundle", metavar="BUNDLE")
    i.add_argument("--json", action="store_true")
    _add_budget_option(i)
    i.set_defaults(func=cmd_info)

    f = sub.add_parser("fit-basis", help="fit one KLT basis on many images of one source")
    f.add_argument("inputs", nargs="+", metavar="INPUT")
    f.add_argument("-o", "--output", required=True, metavar="FILE.wbasis")
    f.add_argument("--block", type=int, default=8, choices=BLOCK_SIZES)
    f.add_argument("--chroma", default="420", choices=["420", "444"])
    f.set_defaults(func=cmd_fit_basis)

    g = sub.add_parser("gui", help="open the desktop app on a folder")
    g.add_argument("folder", nargs="?", help="image folder (default: the last one, or the samples)")
    g.set_defaults(func=cmd_gui)

    for extra in EXTRA_COMMANDS:
        extra(sub)
    return p


def main(argv=None) -> int:
    from . import cli_archive, cli_extra  # noqa: F401  (register batch, restore, sheet and train)
    from .runtime import tune_allocator

    tune_allocator()

    parser = build_parser()
    a = parser.parse_args(argv)
    if a.command is None:
        a = parser.parse_args(["gui"])
    try:
        return a.func(a)
    except BrokenPipeError:
        # The reader of our output went away (``| head``): not an error of ours. Point
        # stdout at devnull so the interpreter's final flush stays quiet (Python's docs, "Note
        # on SIGPIPE", signal module).
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 1
    except (WorkbenchError, OSError) as exc:
        msg = str(exc).splitlines()[0] if str(exc) else exc.__class__.__name__
        print(f"error: {msg}", file=sys.stderr)
        return 2
    except Cancelled:
        print("error: cancelled", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("error: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":
    sys.exit(main())
