"""Sub-commands for archives: ``batch`` (a decision applied to a tree) and ``restore``."""

from __future__ import annotations

import json
import sys
from pathlib import Path

from .cliargs import _add_codec_options, _Bar, _shared_from_args, command, resolve_block, settings_from_args
from .errors import InputError


@command
def _batch(sub):
    p = sub.add_parser("batch", help="compress every image under SRC into bundles under DST (resumable)")
    p.add_argument("src", metavar="SRC", nargs="?", help="source folder (searched recursively)")
    p.add_argument("-o", "--output", metavar="DST", help="output folder (bundles, shared/, manifest.sqlite)")
    p.add_argument("--recipe", metavar="FILE.wrecipe", help="the decision to apply (a quality sheet writes one)")
    p.add_argument("--workers", type=int, metavar="N", help="local worker processes (default: the core count)")
    p.add_argument("--scheduler", metavar="ADDRESS",
                   help="run on a Dask cluster (tcp://HOST:PORT), or 'local' for a LocalCluster; workers must "
                        "see SRC and DST at the same paths")
    p.add_argument("--fit-basis-on", type=int, metavar="N", help="fit one KLT basis on N images sampled from SRC first")
    p.add_argument("--verify", action="store_true", help="afterwards, decode every bundle and re-measure it")
    p.add_argument("--report", metavar="DST", help="print the summary of DST and write DST/report.csv; nothing is run")
    p.add_argument("--json", action="store_true", help="print one JSON summary instead of text")
    _add_codec_options(p)
    p.set_defaults(func=cmd_batch)

    r = sub.add_parser("restore", help="decode a batch output tree back to PNG files at the same paths")
    r.add_argument("dst", metavar="DST")
    r.add_argument("-o", "--output", required=True, metavar="OUT")
    r.add_argument("--verify", action="store_true", help="re-measure against the sources where they still exist")
    r.add_argument("--force", action="store_true", help="rewrite outputs that exist")
    r.add_argument("--only", action="append", metavar="PATTERN",
                   help="restore only the sources whose path in the tree matches (day1/*.tif); repeatable")
    r.set_defaults(func=cmd_restore)


def _recipe_from_args(a, dst: Path) -> dict:
    from . import archive
    from .formats.basisfile import basis_file_bytes, basis_to_bytes, basis_hash

    if a.recipe:
        recipe = archive.read_recipe(a.recipe)
        if recipe["shared"]:
            # the recipe's basis/model must already be in DST/shared or be given again
            given = a.basis or a.model
            if given:
                data = Path(given).read_bytes()
                archive.store_shared(dst, recipe["shared"]["kind"], data, recipe["shared"]["sha256"])
            archive.load_shared(dst, recipe)
        return recipe
    settings = settings_from_args(a)
    if a.fit_basis_on:
        from . import pipeline
        from .codecs import get

        files, images = _sampled(a.src, a.fit_basis_on)
        if not images:
            raise InputError("no readable images to fit a basis on")
        if not settings.traits.folder_scope:
            raise InputError(f"--fit-basis-on: the {settings.traits.label} fits nothing on a folder")
        # the basis is stored once for the whole tree: its cost is shared by every file
        s = resolve_block(a, settings.replace(basis_scope="folder"), images, total=len(files))
        settings = settings.replace(block=s.block, chroma=s.chroma, count=s.count)
        basis, _, _ = get(s.method).prepare_shared([pipeline.image_planes(i, s.chroma) for i in images], s)
        sha = basis_hash(basis_to_bytes(basis))
        archive.store_shared(dst, "basis", basis_file_bytes(basis, sources=[i.name for i in images]), sha)
        return archive.make_recipe(settings, "basis", sha)
    if "auto" in (a.block, a.chroma):
        from .blockchoice import SAMPLE

        files, images = _sampled(a.src, SAMPLE)
        if not images:
            raise InputError("no readable images to choose a block size on")
        settings = resolve_block(a, settings, images, total=len(files))
    shared, ref = _shared_from_args(a)
    if ref is None:
        return archive.make_recipe(settings)
    kind = settings.traits.shared_kind
    data = Path(a.basis or a.model).read_bytes() if (a.basis or a.model) else shared.data.raw
    archive.store_shared(dst, kind, data, ref)
    return archive.make_recipe(settings, kind, ref)


def _sampled(src, n: int):
    """``(all source files under src, up to n of them read, sampled with a fixed seed)``."""
    import numpy as np

    from . import archive
    from .formats.imagefiles import read_many

    files = archive.sources(Path(src))
    if not files:
        return files, []
    pick = np.random.default_rng(0).choice(len(files), min(n, len(files)), replace=False)
    images, _ = read_many([Path(src) / files[i] for i in sorted(pick)])
    return files, images


def _print_summary(s: dict, as_json: bool) -> None:
    if as_json:
        print(json.dumps(s))
        return
    ratio = f"{s['ratio']:.1f} : 1" if s["ratio"] else "–"
    print(f"{s['done']} of {s['items']} items done, {s['failed']} failed; {s['source_bytes']:,} bytes of sources "
          f"-> {s['bundle_bytes']:,} bytes of bundles ({ratio})")
    if s["mean_psnr"] is not None:
        print(f"PSNR mean {s['mean_psnr']:.2f} dB, lowest {s['min_psnr']:.2f} dB"
              + (f"; SSIM mean {s['mean_ssim']:.4f}, lowest {s['min_ssim']:.4f}" if s["mean_ssim"] is not None else ""))
    for f in s["failures"][:20]:
        print(f"  failed: {f['path']}: {f['error']}")


def cmd_batch(a) -> int:
    from . import archive
    from .formats.imagefiles import write_atomic
    from .jobs import run

    if a.report:
        dst = Path(a.report)
        archive.rows(dst)  # refuses a folder without a manifest
        write_atomic(dst / "report.csv", archive.report_csv(dst))
        _print_summary(archive.summary(dst), a.json)
        return 0
    if not a.src or not a.output:
        raise InputError("batch needs SRC and -o DST (or --report DST)")
    dst = Path(a.output)
    recipe = _recipe_from_args(a, dst)
    bar = _Bar(unit="image")
    try:
        s = run(archive.batch_job(a.src, dst, recipe, workers=a.workers, scheduler=a.scheduler), bar)
    except KeyboardInterrupt:
        bar.close()
        print(f"interrupted: finished items are recorded in {dst / archive.MANIFEST}; "
              "run the same command again to resume", file=sys.stderr)
        raise
    bar.close()
    write_atomic(dst / "recipe.wrecipe", archive.recipe_bytes(recipe))
    if a.verify:
        v = run(archive.restore_job(dst, None, verify=True))
        s["verified"], s["mismatches"] = v["verified"], v["mismatches"]
    _print_summary(s, a.json)
    if a.verify and not a.json:
        print(f"verified {s['verified']} bundles against their sources: {len(s['mismatches'])} mismatches")
    return 0 if not s["failed"] and not s.get("mismatches") else 1


def cmd_restore(a) -> int:
    from . import archive
    from .jobs import run

    stats = run(archive.restore_job(a.dst, a.output, verify=a.verify, force=a.force, only=a.only))
    print(f"restored {stats['restored']} bundles into {a.output}, kept {stats['kept']} already there"
          + (f"; verified {stats['verified']} against their sources" if a.verify else ""))
    for m in stats["mismatches"]:
        print(f"  mismatch: {m}")
    return 1 if stats["mismatches"] else 0
