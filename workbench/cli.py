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

from . import __version__, codecs
from .errors import Cancelled, WorkbenchError
from .settings import BLOCK_SIZES, Settings

EPILOG = "Steps are in 8-bit grey levels (1/255 of full scale) for 8- and 16-bit sources alike."


def _add_codec_options(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("codec")
    g.add_argument("--method", default="klt", choices=codecs.names(),
                   help="transform: " + ", ".join(f"{n} ({codecs.label(n)})" for n in codecs.names()) + " (default klt)")
    g.add_argument("--block", type=int, default=8, choices=BLOCK_SIZES, help="KLT patch side B (default 8)")
    g.add_argument("--count", "--components", "--latent", dest="count", type=int, metavar="K",
                   help="what the method keeps: " + ", ".join(f"{codecs.traits(n).count_label} ({n})"
                                                             for n in codecs.names()) + " (default all)")
    g.add_argument("--chroma", default="420", choices=["420", "444"], help="chroma sampling for colour images (default 420)")
    g.add_argument("--basis-scope", default="image", choices=["image", "folder"],
                   help="KLT basis per image, or one for all images stored once in the bundle (default image)")
    g.add_argument("--basis", metavar="FILE", help="external .wbasis file: bundles refer to it by hash instead of carrying a basis")
    g.add_argument("--model", metavar="FILE", help="conv model file (.wmodel); default: the shipped model")
    g.add_argument("--embed-model", action="store_true", help="carry the conv model inside the bundle")
    r = p.add_argument_group("rate (choose one)").add_mutually_exclusive_group()
    r.add_argument("--step", type=float, help="quantiser step in 8-bit grey levels (default 8)")
    r.add_argument("--target-psnr", type=float, metavar="DB", help="per image, the coarsest step whose PSNR reaches DB")
    r.add_argument("--target-ssim", type=float, metavar="S", help="per image, the coarsest step whose SSIM reaches S")
    r.add_argument("--target-bpp", type=float, metavar="R", help="per image, the finest step whose rate stays within R bits per pixel")
    r.add_argument("--target-measures", action="store_true",
                   help="per image, the coarsest step at which every --measure stays within its tolerances")
    m = p.add_argument_group("measurements on original and reconstruction")
    m.add_argument("--measure", metavar="LIST", default="",
                   help="comma-separated: spots, regions, edges and/or FILE.py defining measure(pixels) -> dict "
                        "(a FILE.py runs as your own code, with your rights)")
    m.add_argument("--tolerance", action="append", default=[], metavar="NAME.KEY<=V",
                   help="replace a default tolerance, e.g. spots.shift_px<=0.3 or regions.dice>=0.99 (repeatable)")


def measures_from_args(a):
    """The measurements asked for, or None; --target-measures without --measure is an error."""
    from . import measures

    chosen = measures.parse(a.measure, a.tolerance) if a.measure else None
    if a.target_measures and not chosen:
        raise WorkbenchError("--target-measures needs --measure")
    if a.tolerance and not chosen:
        raise WorkbenchError("--tolerance needs --measure")
    return chosen


def _add_budget_option(p: argparse.ArgumentParser) -> None:
    from .bundle import MAX_PIXELS

    p.add_argument("--max-pixels", type=int, default=MAX_PIXELS, metavar="N",
                   help=f"refuse bundles declaring more than N pixels in all (default {MAX_PIXELS:,}: "
                        f"{MAX_PIXELS * 6 / 2**30:.1f} GiB of 16-bit RGB)")


def settings_from_args(a) -> Settings:
    target = None
    for kind in ("psnr", "ssim", "bpp"):
        v = getattr(a, f"target_{kind}", None)
        if v is not None:
            target = (kind, v)
    kw = dict(method=a.method, block=a.block, count=a.count, chroma=a.chroma, basis_scope=a.basis_scope,
              target=target)
    if a.step is not None:
        kw["step"] = a.step
    return Settings(**kw)


def _shared_from_args(a, method: str | None = None):
    """The shared side (basis or model) given by --basis/--model, and its hash, or (None, None).

    ``method`` is the one whose file it is (a bundle's, when decoding); by default ``--method``.
    """
    path = getattr(a, "basis", None) or getattr(a, "model", None)
    if not path:
        return None, None
    return codecs.get(method or a.method).load_shared(path)


def _read_inputs(inputs):
    from .imagefiles import read_many

    images, skipped = read_many(inputs)
    for name, why in skipped:
        print(f"warning: skipped {why}", file=sys.stderr)
    return images, skipped


class _Bar:
    """A terminal progress bar (tqdm) fed with a job's Progress; silent when stderr is not a
    terminal, so scripts and logs get the result lines only."""

    def __init__(self):
        self.bar = None

    def __call__(self, p) -> None:
        if not sys.stderr.isatty():
            return
        if self.bar is None:
            from tqdm import tqdm

            self.bar = tqdm(total=1000, file=sys.stderr, leave=False, dynamic_ncols=True,
                            bar_format="{l_bar}{bar}| {elapsed}<{remaining} {postfix}")
        self.bar.n = int(1000 * p.fraction)
        self.bar.set_postfix_str(p.text[:40], refresh=False)
        self.bar.refresh()
        if p.fraction >= 1:
            self.bar.close()


def _progress():
    return _Bar()


def cmd_encode(a) -> int:
    from . import pipeline
    from .imagefiles import list_inputs, write_atomic
    from .jobs import run

    settings = settings_from_args(a)
    shared, ref = _shared_from_args(a)
    images, _ = _read_inputs(a.inputs)
    chosen = measures_from_args(a)
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
    from .imagefiles import encode_png, write_all_atomic
    from .names import output_paths

    from . import bundle

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
    from . import bundle

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
    print(s.describe() + (f"; {side} {info['basis']}" if side else ""))
    for e in info["images"]:
        print(f"  {e['name']}: {e['width']}x{e['height']} {e['bits']}-bit {e['channels']} ch"
              f"{' +alpha' if e['alpha'] else ''}, {e['payload_bytes']} bytes")
    return 0


def cmd_fit_basis(a) -> int:
    from . import pipeline
    from .basisfile import save_basis
    from .codecs.klt import CODEC
    from .imagefiles import list_inputs

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

    for extra in _EXTRA_COMMANDS:
        extra(sub)
    return p


_EXTRA_COMMANDS: list = []


def command(register):
    """Decorator for modules that add a sub-command (sheet, train)."""
    _EXTRA_COMMANDS.append(register)
    return register


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
