"""Apply one decision to a whole tree of images, resumably, locally or on a Dask cluster; and back.

* A **recipe** (``.wrecipe``, JSON) is a decision: the settings, the basis or model by
  SHA-256, the tool's version. The quality sheet writes one; :func:`read_recipe` checks it.
* :func:`batch_job` turns every image under SRC (recursively) into a bundle under DST at the
  same relative path plus ``.wbundle`` (one bundle per source file: any one can be restored,
  moved or deleted alone; a shared basis or model is referred to by hash and stored once in
  ``DST/shared``). Sources are only read.
* The **manifest** ``DST/manifest.sqlite`` (sqlite3, WAL) has one row per source: path,
  size, mtime, SHA-256, status, bundle, bytes, bpp, PSNR, SSIM, seconds, worker, error. A row
  is committed after its bundle is durably renamed into place, so a kill at any moment loses
  at most the items in flight; a rerun skips items whose bundle and row agree and redoes the
  rest, and redoes a source that changed since.
* Tasks are plain functions of (source, recipe) returning a row (:func:`encode_one`); a local
  process pool or a ``dask.distributed`` cluster runs them, the driver alone writes the
  manifest. On a cluster, workers must see SRC and DST at the same paths (a shared file system).
* :func:`restore_job` decodes a DST tree back to PNG files at the same relative paths.
"""

from __future__ import annotations

import hashlib
import json
import os
import socket
import sqlite3
import time
from pathlib import Path

from .version import __version__
from .errors import BundleError, InputError, WorkbenchError
from .jobs import Progress
from .formats.names import IMAGE_SUFFIXES
from .settings import Settings

RECIPE_KIND = "workbench-recipe"
MANIFEST = "manifest.sqlite"
SHARED = "shared"
SUFFIXES = {"basis": "wbasis", "model": "wmodel"}  # file kinds of the shared sides
COLUMNS = ("path", "size", "mtime_ns", "source_sha256", "status", "bundle", "bundle_sha256", "bytes", "bpp", "psnr",
           "ssim", "seconds", "worker", "error", "images")


# ------------------------------------------------------------------ recipes


def make_recipe(settings: Settings, shared_kind: str | None = None, shared_ref: str | None = None) -> dict:
    """A recipe: the settings and, when one is used, the basis or model by content hash."""
    return {"kind": RECIPE_KIND, "version": 1, "tool": f"workbench {__version__}", "settings": settings.to_dict(),
            "shared": None if shared_ref is None else {"kind": shared_kind, "sha256": shared_ref}}


def recipe_bytes(recipe: dict) -> bytes:
    return json.dumps(recipe, indent=1, sort_keys=True).encode()


def read_recipe(path) -> dict:
    """Read and check a ``.wrecipe`` file; raises InputError naming what is wrong."""
    try:
        d = json.loads(Path(path).read_text())
    except (OSError, ValueError) as exc:
        raise InputError(f"{path}: not a readable recipe ({exc})") from None
    if not isinstance(d, dict) or d.get("kind") != RECIPE_KIND:
        raise InputError(f"{path}: not a workbench recipe")
    Settings.from_dict(d.get("settings"))
    shared = d.get("shared")
    if shared is not None and not (isinstance(shared, dict) and shared.get("kind") in ("basis", "model")
                                   and isinstance(shared.get("sha256"), str) and len(shared["sha256"]) == 64):
        raise InputError(f"{path}: the recipe's basis/model reference is invalid")
    return d


# ------------------------------------------------------------------ the manifest


def open_manifest(dst: Path) -> sqlite3.Connection:
    dst.mkdir(parents=True, exist_ok=True)
    db = sqlite3.connect(dst / MANIFEST, timeout=30)
    db.execute("PRAGMA journal_mode=WAL")
    db.execute("PRAGMA synchronous=FULL")  # a committed row survives a power cut
    db.execute("CREATE TABLE IF NOT EXISTS items (path TEXT PRIMARY KEY, size INTEGER, mtime_ns INTEGER, "
               "source_sha256 TEXT, status TEXT, bundle TEXT, bundle_sha256 TEXT, bytes INTEGER, bpp REAL, "
               "psnr REAL, ssim REAL, seconds REAL, worker TEXT, error TEXT, images INTEGER)")
    db.execute("CREATE TABLE IF NOT EXISTS run (key TEXT PRIMARY KEY, value TEXT)")
    return db


def _put(db: sqlite3.Connection, row: dict) -> None:
    db.execute(f"INSERT OR REPLACE INTO items ({', '.join(COLUMNS)}) VALUES ({', '.join('?' * len(COLUMNS))})",
               [row.get(c) for c in COLUMNS])
    db.commit()


def _read_only(dst) -> sqlite3.Connection:
    """The manifest opened for reading only (a missing one is an error, not a new empty file)."""
    path = (Path(dst) / MANIFEST).resolve()
    if not path.exists():
        raise InputError(f"{dst}: no {MANIFEST} here; not a batch output folder")
    return sqlite3.connect(f"{path.as_uri()}?mode=ro", uri=True, timeout=30)


def rows(dst) -> list[dict]:
    """Every manifest row of a batch output tree, by path."""
    db = _read_only(dst)
    try:
        cur = db.execute(f"SELECT {', '.join(COLUMNS)} FROM items ORDER BY path")
        return [dict(zip(COLUMNS, r)) for r in cur.fetchall()]
    finally:
        db.close()


# ------------------------------------------------------------------ one item (runs anywhere)


def file_sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def encode_one(src_root: str, rel: str, dst_root: str, recipe: dict) -> dict:
    """Encode one source file into its bundle; returns its manifest row (never raises for bad input)."""
    from . import pipeline
    from .formats.imagefiles import read_many, write_atomic

    _one_core()
    t0 = time.perf_counter()
    src, dst = Path(src_root) / rel, Path(dst_root) / (rel + ".wbundle")
    st = src.stat()
    row = {"path": rel, "size": st.st_size, "mtime_ns": st.st_mtime_ns, "source_sha256": file_sha256(src),
           "bundle": rel + ".wbundle", "worker": f"{socket.gethostname()}:{os.getpid()}"}
    try:
        images, skipped = read_many([src])
        if skipped:
            raise InputError(skipped[0][1])
        settings = Settings.from_dict(recipe["settings"])
        shared, ref = load_shared(Path(dst_root), recipe)
        result = pipeline.encode(images, settings, shared=shared, shared_ref=ref)
        write_atomic(dst, result.data, protect={src})
        px = sum(r.pixels for r in result.images)
        row.update(status="done", bundle_sha256=hashlib.sha256(result.data).hexdigest(), bytes=result.size,
                   bpp=8 * result.size / px, psnr=_mean(r.psnr for r in result.images),
                   ssim=_mean(r.ssim for r in result.images), images=len(result.images), error=None)
    except (WorkbenchError, OSError, MemoryError) as exc:
        row.update(status="failed", error=str(exc).splitlines()[0] if str(exc) else type(exc).__name__)
    row["seconds"] = time.perf_counter() - t0
    return row


_LIMITED = False


def _one_core() -> None:
    """Set up a batch worker once per process (pool or Dask worker): one core each, so that N
    workers scale to N cores instead of each one's BLAS and OpenCV threads fighting the
    others'; and the allocator tuned as the command line tunes it (a Dask worker starts with
    ``MALLOC_TRIM_THRESHOLD_=65536``, which returns every image buffer to the system and made
    each encode 2.4 times slower)."""
    global _LIMITED
    if not _LIMITED:
        import cv2
        from threadpoolctl import threadpool_limits

        from .runtime import tune_allocator

        cv2.setNumThreads(1)
        threadpool_limits(1)
        tune_allocator()
        _LIMITED = True


def _mean(values) -> float:
    v = [x for x in values if x == x and x != float("inf")]
    return sum(v) / len(v) if v else float("nan")


def load_shared(dst: Path, recipe: dict):
    """The recipe's basis or model from ``DST/shared`` (checked by hash), or (None, None)."""
    ref = recipe.get("shared")
    if not ref:
        return None, None
    from . import codecs

    codec = codecs.get(recipe["settings"]["method"])
    path = dst / SHARED / f"{ref['sha256']}.{SUFFIXES[ref['kind']]}"
    if not path.exists():
        builtin = codec.builtin(ref["sha256"])  # a shipped model needs no copy
        if builtin is not None:
            return builtin, ref["sha256"]
        raise InputError(f"{path}: the recipe's {ref['kind']} is not in {dst / SHARED}; pass it with "
                         f"--{ref['kind']}")
    shared, sha = codec.load_shared(path)
    if sha != ref["sha256"]:
        raise BundleError(f"{path}: content does not match the recipe's SHA-256")
    return shared, sha


# ------------------------------------------------------------------ the driver


def sources(src: Path) -> list[str]:
    """Relative POSIX paths of every image file under ``src``, recursively, sorted."""
    return sorted(p.relative_to(src).as_posix() for p in src.rglob("*")
                  if p.is_file() and p.suffix.lower() in IMAGE_SUFFIXES)


def _up_to_date(dst: Path, src: Path, rel: str, row: dict | None) -> bool:
    if row is None or row["status"] != "done":
        return False
    p, b = src / rel, dst / row["bundle"]
    try:
        st = p.stat()
        if (st.st_size, st.st_mtime_ns) != (row["size"], row["mtime_ns"]) or not b.exists():
            return False
        return file_sha256(b) == row["bundle_sha256"] and file_sha256(p) == row["source_sha256"]
    except OSError:
        return False


def store_shared(dst: Path, kind: str, data: bytes, sha: str) -> None:
    """Copy a basis or model into ``DST/shared`` once, under its hash."""
    from .formats.imagefiles import write_atomic

    path = dst / SHARED / f"{sha}.{SUFFIXES[kind]}"
    if not path.exists():
        write_atomic(path, data)


def batch_job(src, dst, recipe: dict, *, workers: int | None = None, scheduler: str | None = None):
    """Generator job: bring DST up to date with SRC under ``recipe``; returns the summary dict.

    ``scheduler``: None for a local process pool of ``workers`` processes, ``"local"`` for a
    Dask ``LocalCluster``, or a Dask scheduler address (``tcp://host:port``).
    """
    src, dst = Path(src).resolve(), Path(dst).resolve()
    if not src.is_dir():
        raise InputError(f"{src}: not a folder")
    if dst == src or src in dst.parents:
        raise InputError(f"{dst}: choose an output folder outside the source tree")
    db = open_manifest(dst)
    try:
        db.execute("INSERT OR REPLACE INTO run VALUES ('source', ?)", (str(src),))
        db.execute("INSERT OR REPLACE INTO run VALUES ('recipe', ?)", (json.dumps(recipe, sort_keys=True),))
        db.commit()
        known = {r["path"]: r for r in rows(dst)}
        todo = [rel for rel in sources(src) if not _up_to_date(dst, src, rel, known.get(rel))]
        total, done, psnrs = len(todo), 0, []
        yield Progress(0, max(total, 1), f"{total} to do, {len(known) - len(set(known) & set(todo))} up to date")
        with _runner(workers, scheduler) as run:
            for row in run(encode_one, [(str(src), rel, str(dst), recipe) for rel in todo]):
                _put(db, row)
                done += 1
                if row.get("psnr") is not None and row["psnr"] == row["psnr"]:
                    psnrs.append(row["psnr"])
                mean = f", mean PSNR {sum(psnrs) / len(psnrs):.2f} dB" if psnrs else ""
                yield Progress(done, max(total, 1), f"{row['path']}: {row['status']}{mean}")
        from .formats.imagefiles import remove_stale_parts_under

        remove_stale_parts_under(dst)
        return summary(dst)
    finally:
        db.close()


class _runner:
    """Context manager giving ``run(fn, arg_tuples)`` that yields results as they complete."""

    def __init__(self, workers, scheduler):
        self.workers = workers or os.cpu_count() or 1
        self.scheduler = scheduler
        self._close = []

    def __enter__(self):
        if self.scheduler is None:
            from . import jobs

            pool = jobs.pool(self.workers)
            self._close.append(lambda: pool.shutdown(wait=False, cancel_futures=True))

            def run(fn, args):
                from concurrent.futures import as_completed

                futures = [pool.submit(fn, *a) for a in args]
                for f in as_completed(futures):
                    yield f.result()
            return run
        try:
            from dask.distributed import Client, LocalCluster, as_completed
        except ImportError:
            raise InputError("--scheduler needs dask.distributed: pip install -e \".[cluster]\"") from None
        if self.scheduler == "local":
            import dask

            # The workers' statistical profiler samples every thread each 10 ms, which costs
            # our Python-heavy coder several per cent; the dashboard is off anyway.
            with dask.config.set({"distributed.worker.profile.enabled": False}):
                cluster = LocalCluster(n_workers=self.workers, threads_per_worker=1, host="127.0.0.1",
                                       dashboard_address=None)
            client = Client(cluster)
            self._close += [client.close, cluster.close]
        else:
            client = Client(self.scheduler, timeout=30)
            self._close.append(client.close)

        from . import codecs, jobs

        extra = codecs.extras()  # methods registered at run time, which the workers must know too

        def run(fn, args):
            futures = [client.submit(jobs.call_with_codecs, extra, fn, *a, pure=False) for a in args]
            for f in as_completed(futures):
                yield f.result()
        return run

    def __exit__(self, *exc):
        for close in self._close:
            try:
                close()
            except Exception:  # noqa: BLE001 - shutting down after an interrupt or an error
                pass
        return False


def done_count(dst) -> int:
    """How many items a batch has finished so far (0 before its manifest exists); safe to
    call while the batch runs."""
    try:
        db = _read_only(dst)
    except InputError:
        return 0
    try:
        return db.execute("SELECT COUNT(*) FROM items WHERE status='done'").fetchone()[0]
    except sqlite3.Error:  # the driver has not made the table yet
        return 0
    finally:
        db.close()


def summary(dst) -> dict:
    """Counts, bytes in and out, mean and lowest PSNR/SSIM, failures with reasons."""
    rs = rows(dst)
    ok = [r for r in rs if r["status"] == "done"]
    src_bytes, out_bytes = sum(r["size"] for r in ok), sum(r["bytes"] for r in ok)
    fin = [r["psnr"] for r in ok if r["psnr"] is not None and r["psnr"] == r["psnr"]]
    ss = [r["ssim"] for r in ok if r["ssim"] is not None and r["ssim"] == r["ssim"]]
    return {"items": len(rs), "done": len(ok), "failed": sum(r["status"] == "failed" for r in rs),
            "source_bytes": src_bytes, "bundle_bytes": out_bytes,
            "ratio": src_bytes / out_bytes if out_bytes else None,
            "mean_psnr": sum(fin) / len(fin) if fin else None, "min_psnr": min(fin) if fin else None,
            "mean_ssim": sum(ss) / len(ss) if ss else None, "min_ssim": min(ss) if ss else None,
            "failures": [{"path": r["path"], "error": r["error"]} for r in rs if r["status"] == "failed"]}


def report_csv(dst) -> bytes:
    import csv
    import io

    buf = io.StringIO()
    w = csv.writer(buf)
    w.writerow(COLUMNS)
    for r in rows(dst):
        w.writerow(["" if r[c] is None else r[c] for c in COLUMNS])
    return buf.getvalue().encode()


# ------------------------------------------------------------------ back again

# What a decoder on another CPU may change. The integer streams decode identically
# everywhere, but the float stages after them (the KLT's inverse transform in BLAS, the conv
# synthesis in torch, in bfloat16 on one CPU and float32 on another) may round a sample one
# grey level the other way. Measured with the shipped conv model on a 4-MP mosaic, bfloat16
# against float32 at steps 4/8/24: 3.5-3.8 % of the samples one level off, none more, mean
# squared error +0.04 levels^2. A verification accepts a mean squared error within
# VERIFY_MSE + VERIFY_MSE_REL of the manifest's (in 8-bit levels^2 of full scale) and an
# SSIM within VERIFY_SSIM: room for a quarter of the samples one level off (six times what
# was measured), and far below what a wrong model, a changed source or damaged pixels do.
VERIFY_MSE = 0.25
VERIFY_MSE_REL = 0.01
VERIFY_SSIM = 1e-3


def same_psnr(got: float, manifest: float | None) -> bool:
    """Whether PSNR ``got`` (dB) agrees with the manifest's within what decoding on
    another CPU explains (``None`` or infinity in the manifest: a lossless image)."""
    def mse(p):  # in 8-bit levels^2 of full scale; infinity (identical) is 0
        return 0.0 if p is None or p == float("inf") else 255.0 ** 2 * 10.0 ** (-p / 10.0)

    want = mse(manifest)
    return abs(mse(got) - want) <= VERIFY_MSE + VERIFY_MSE_REL * want


def restore_job(dst, out, *, verify: bool = False, force: bool = False, only: list[str] | None = None):
    """Generator job: decode every bundle of a batch tree into PNGs at the same relative paths
    (``a/b.tif`` -> ``OUT/a/b.png``; pages of a stack -> ``OUT/a/b[0].png``…). Outputs that
    exist are kept (a rerun completes what is missing) unless ``force``. With ``verify``, each
    bundle's decoded pixels are re-measured against its source where it still exists, and
    compared with the manifest. ``only``: shell patterns (``day1/*``, ``*.tif``); just the
    sources whose path in the tree matches one are restored, and a pattern that matches none
    is an error. Returns ``{"restored", "kept", "verified", "mismatches"}``."""
    from . import pipeline
    from .quality import metrics
    from .formats.imagefiles import encode_png, read_many, write_all_atomic
    from .formats.names import output_paths

    dst, out = Path(dst), (None if out is None else Path(out))
    db = _read_only(dst)
    try:
        src = Path((db.execute("SELECT value FROM run WHERE key='source'").fetchone() or [""])[0])
        recipe = json.loads((db.execute("SELECT value FROM run WHERE key='recipe'").fetchone() or ["{}"])[0])
    finally:
        db.close()
    if out is not None and src.parts and (out.resolve() == src.resolve() or src.resolve() in out.resolve().parents):
        raise InputError(f"{out}: choose a folder outside the sources ({src}); restoring there could replace them")
    done = [r for r in rows(dst) if r["status"] == "done"]
    if only:
        from fnmatch import fnmatchcase

        unmatched = [p for p in only if not any(fnmatchcase(r["path"], p) for r in done)]
        if unmatched:
            raise InputError(f"{unmatched[0]!r} matches no image done in {dst}")
        done = [r for r in done if any(fnmatchcase(r["path"], p) for p in only)]
    stats = {"restored": 0, "kept": 0, "verified": 0, "mismatches": []}
    shared, ref = load_shared(dst, recipe) if recipe else (None, None)
    for n, r in enumerate(done):
        yield Progress(n, len(done), r["path"])
        data = (dst / r["bundle"]).read_bytes()
        if hashlib.sha256(data).hexdigest() != r["bundle_sha256"]:
            stats["mismatches"].append(f"{r['bundle']}: bundle bytes differ from the manifest's SHA-256")
            continue
        _, decoded = pipeline.decode(data, shared=shared, shared_ref=ref)
        rel = Path(r["path"])
        names = [d.name for d in decoded]
        targets = [] if out is None else [out / rel.parent / p for p in output_paths(names)]
        if out is None:
            pass  # checking only
        elif all(t.exists() for t in targets) and not force:
            stats["kept"] += 1
        else:
            write_all_atomic((t, encode_png(d.pixels)) for t, d in zip(targets, decoded))
            stats["restored"] += 1
        if verify and (src / rel).exists():
            images, _ = read_many([src / rel])
            pairs = [(i, d.pixels[..., : i.pixels.shape[2]] if i.pixels.ndim == 3 else
                      d.pixels if d.pixels.ndim == 2 else d.pixels[..., 0]) for i, d in zip(images, decoded)]
            got = _mean(metrics.psnr(i.pixels, px, data_range=i.peak) for i, px in pairs)
            if not same_psnr(got, r["psnr"]):
                stats["mismatches"].append(f"{r['path']}: PSNR {got:.6f} dB now, {r['psnr']:.6f} dB in the manifest")
            ssim = _mean(metrics.ssim(i.pixels, px, data_range=i.peak) for i, px in pairs
                         if metrics.ssim_applies(i.height, i.width))
            if r["ssim"] is not None and r["ssim"] == r["ssim"] and abs(ssim - r["ssim"]) > VERIFY_SSIM:
                stats["mismatches"].append(f"{r['path']}: SSIM {ssim:.6f} now, {r['ssim']:.6f} in the manifest")
            stats["verified"] += 1
    if out is not None:
        from .formats.imagefiles import remove_stale_parts_under

        remove_stale_parts_under(out)
    yield Progress(len(done), len(done), "done")
    return stats
