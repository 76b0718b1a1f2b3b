"""Options and helpers every sub-command shares: codec options, settings from flags, the
shared side, reading inputs, the progress bar, and the registry of extra sub-commands.

Modules adding sub-commands (``cli_extra``, ``cli_archive``) import from here, and
:mod:`workbench.cli` imports them: no module imports the command line back.
"""

from __future__ import annotations

import argparse
import sys

from . import codecs
from .errors import WorkbenchError
from .settings import BLOCK_SIZES, Settings

EPILOG = "Steps are in 8-bit grey levels (1/255 of full scale) for 8- and 16-bit sources alike."


def _add_codec_options(p: argparse.ArgumentParser) -> None:
    g = p.add_argument_group("codec")
    g.add_argument("--method", default="klt", choices=codecs.names(),
                   help="transform: " + ", ".join(f"{n} ({codecs.label(n)})" for n in codecs.names()) + " (default klt)")
    g.add_argument("--block", type=block_size, default=8, metavar="{" + ",".join(map(str, BLOCK_SIZES)) + ",auto}",
                   help="KLT patch side B, or auto: the size of lowest rate–distortion cost on a sample of "
                        "the images (default 8)")
    g.add_argument("--count", "--components", "--latent", dest="count", type=int, metavar="K",
                   help="what the method keeps: " + ", ".join(f"{codecs.traits(n).count_label} ({n})"
                                                             for n in codecs.names()) + " (default all)")
    g.add_argument("--chroma", default="420", choices=["420", "444", "auto"],
                   help="chroma sampling for colour images; auto: the one of lower rate–distortion cost, as for "
                        "--block auto (default 420)")
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


def block_size(text: str):
    """``--block``'s value: one of the block sizes, or ``"auto"``."""
    if text == "auto":
        return text
    if text.isdigit() and int(text) in BLOCK_SIZES:
        return int(text)
    raise argparse.ArgumentTypeError(f"choose one of {', '.join(map(str, BLOCK_SIZES))} or auto, not {text!r}")


def resolve_block(a, settings: Settings, images, total: int | None = None) -> Settings:
    """``settings`` with ``--block auto`` and ``--chroma auto`` resolved on ``images`` (the
    folder holds ``total``), saying on stderr what was chosen and why; unchanged otherwise."""
    auto_block, auto_chroma = getattr(a, "block", None) == "auto", getattr(a, "chroma", None) == "auto"
    if not (auto_block or auto_chroma):
        return settings
    from . import blockchoice

    if settings.method != "klt":
        raise WorkbenchError(f"--block/--chroma auto choose the KLT's; the {settings.traits.label} has its own")
    if getattr(a, "basis", None):
        raise WorkbenchError("--block/--chroma auto cannot be used with --basis: the basis file fixes both")
    chosen, costs = blockchoice.choose_block(images, settings, total, blocks=None if auto_block else (settings.block,),
                                             chromas=("420", "444") if auto_chroma else None)
    print(blockchoice.describe(costs, chosen), file=sys.stderr)
    return chosen


def measures_from_args(a):
    """The measurements asked for, or None; --target-measures without --measure is an error."""
    from .quality import measures

    chosen = measures.parse(a.measure, a.tolerance) if a.measure else None
    if a.target_measures and not chosen:
        raise WorkbenchError("--target-measures needs --measure")
    if a.tolerance and not chosen:
        raise WorkbenchError("--tolerance needs --measure")
    return chosen


def _add_budget_option(p: argparse.ArgumentParser) -> None:
    from .formats.bundle import MAX_PIXELS

    p.add_argument("--max-pixels", type=int, default=MAX_PIXELS, metavar="N",
                   help=f"refuse bundles declaring more than N pixels in all (default {MAX_PIXELS:,}: "
                        f"{MAX_PIXELS * 6 / 2**30:.1f} GiB of 16-bit RGB)")


def settings_from_args(a) -> Settings:
    target = None
    for kind in ("psnr", "ssim", "bpp"):
        v = getattr(a, f"target_{kind}", None)
        if v is not None:
            target = (kind, v)
    kw = dict(method=a.method, block=8 if a.block == "auto" else a.block, count=a.count,
              chroma="420" if a.chroma == "auto" else a.chroma, basis_scope=a.basis_scope,
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
    from .formats.imagefiles import read_many

    images, skipped = read_many(inputs)
    for name, why in skipped:
        print(f"warning: skipped {why}", file=sys.stderr)
    return images, skipped


class _Bar:
    """A terminal progress bar (tqdm) fed with a job's Progress; silent when stderr is not a
    terminal, so scripts and logs get the result lines only.

    With ``unit`` (``"image"``) it counts items, with their rate and ETA, and stays until
    :meth:`close`; without, it shows the fraction done and goes when the job is.
    """

    def __init__(self, unit: str | None = None):
        self.bar, self.unit = None, unit

    def __call__(self, p) -> None:
        if not sys.stderr.isatty():
            return
        if self.bar is None:
            from tqdm import tqdm

            if self.unit:
                self.bar = tqdm(total=int(p.total), file=sys.stderr, unit=self.unit, dynamic_ncols=True)
            else:
                self.bar = tqdm(total=1000, file=sys.stderr, leave=False, dynamic_ncols=True,
                                bar_format="{l_bar}{bar}| {elapsed}<{remaining} {postfix}")
        self.bar.n = int(p.done) if self.unit else int(1000 * p.fraction)
        self.bar.set_postfix_str(p.text[-40:] if self.unit else p.text[:40], refresh=False)
        self.bar.refresh()
        if p.fraction >= 1 and not self.unit:
            self.close()

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


def _progress():
    return _Bar()


EXTRA_COMMANDS: list = []


def command(register):
    """Decorator for modules that add a sub-command (sheet, train)."""
    EXTRA_COMMANDS.append(register)
    return register


