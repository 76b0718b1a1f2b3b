"""Image names: how source paths become names inside a bundle, and names become files.

A bundle stores each image under a relative POSIX-style name (``x.png``, ``q/x.png``).
Encoding gives each source the shortest trailing part of its path that tells it apart
from the others; decoding turns whatever names a bundle holds (it may come from anywhere)
into safe, unique, stable relative output paths that never leave the output folder.
"""

from __future__ import annotations

import re
import unicodedata
from pathlib import Path, PurePosixPath

MAX_NAME = 1024
IMAGE_SUFFIXES = {".png", ".jpg", ".jpeg", ".tif", ".tiff", ".bmp", ".webp", ".gif", ".ppm", ".pgm", ".pnm"}
# Characters no common file system takes in a name (Windows' reserved set, the C0 controls,
# DEL); replaced, so that a bundle made anywhere decodes anywhere.
_UNSAFE = re.compile(r'[\x00-\x1f\x7f<>:"|?*]')
_PAGE = re.compile(r"^(.*)\.tiff?\[(\d+)\]$", re.IGNORECASE)  # one page of a TIFF stack: "stack.tif[3]"
_RESERVED = {"con", "prn", "aux", "nul", *(f"com{i}" for i in range(10)), *(f"lpt{i}" for i in range(10))}


def clean_text(s: str) -> str:
    """``s`` with undecodable file-name bytes (Python's surrogate escapes) made visible as U+FFFD."""
    return s.encode("utf-8", "surrogateescape").decode("utf-8", "replace")


def name_problem(name) -> str | None:
    """Why ``name`` cannot be stored as an image name in a bundle, or ``None`` if it can."""
    if not isinstance(name, str):
        return f"not text ({type(name).__name__})"
    if not name or len(name) > MAX_NAME:
        return f"length {len(name)} is outside 1..{MAX_NAME}"
    if "\x00" in name:
        return "it holds a NUL character"
    try:
        name.encode("utf-8")
    except UnicodeEncodeError:
        return "it is not valid Unicode text"
    return None


def bundle_names(paths: list[Path]) -> list[str]:
    """Names for source files: each the shortest trailing run of path parts unique among them.

    ``a/x.png`` alone is ``x.png``; with ``b/x.png`` beside it the two are ``a/x.png`` and
    ``b/x.png``. Paths must be distinct files.
    """
    # resolved, so that "../x.png" is named by its real folders; the anchor ("/", "C:\\") is left out
    parts = [[clean_text(p) for p in Path(path).resolve().parts[1:]] or ["image"] for path in paths]
    depth = [1] * len(parts)
    while True:
        names = ["/".join(p[-d:]) for p, d in zip(parts, depth)]
        seen: dict[str, list[int]] = {}
        for i, n in enumerate(names):
            seen.setdefault(n.casefold(), []).append(i)
        clashes = [ix for ix in seen.values() if len(ix) > 1]
        grown = False
        for ix in clashes:
            for i in ix:
                if depth[i] < len(parts[i]):
                    depth[i] += 1
                    grown = True
        if not clashes or not grown:
            break
    # Paths that still clash (the same parts all the way up, or a case-only difference) get a counter.
    return _numbered(names, set())


def _safe_part(part: str) -> str:
    part = unicodedata.normalize("NFC", _UNSAFE.sub("_", part)).rstrip(" .")
    if part.split(".")[0].casefold() in _RESERVED:
        part = "_" + part
    return part


def output_paths(names: list[str], suffix: str = ".png") -> list[PurePosixPath]:
    """Relative output paths for decoded images, in order: safe, unique (ignoring case) and stable.

    Both ``/`` and ``\\`` separate folders; empty, ``.`` and ``..`` parts are dropped, so no
    path leaves the output folder. An image suffix is replaced by ``suffix``; a name left
    empty becomes ``image``. Clashes (``a.png``, ``a.jpg``, ``a``) are numbered in bundle
    order: ``a.png``, ``a-2.png``, ``a-3.png``.
    """
    out = []
    for name in names:
        parts = [_safe_part(p) for p in re.split(r"[/\\]", clean_text(str(name)))]
        parts = [p for p in parts if p not in ("", ".", "..")] or ["image"]
        page = _PAGE.match(parts[-1])
        leaf = PurePosixPath(parts[-1])
        stem = f"{page[1]}[{page[2]}]" if page else leaf.stem if leaf.suffix.lower() in IMAGE_SUFFIXES else leaf.name
        parts[-1] = (stem or "image") + suffix
        out.append("/".join(parts))
    # A folder and a file of the same name cannot both exist: treat folder prefixes as taken.
    folders = {"/".join(p.split("/")[:i]).casefold() for p in out for i in range(1, p.count("/") + 1)}
    return [PurePosixPath(p) for p in _numbered(out, folders)]


def _numbered(paths: list[str], taken: set[str]) -> list[str]:
    out, used = [], set(taken)
    for p in paths:
        head, _, leaf = p.rpartition("/")
        stem, ext = (leaf.rsplit(".", 1) + [""])[:2] if "." in leaf else (leaf, "")
        candidate, k = p, 1
        while candidate.casefold() in used:
            k += 1
            candidate = (head + "/" if head else "") + f"{stem}-{k}" + (f".{ext}" if ext else "")
        used.add(candidate.casefold())
        out.append(candidate)
    return out
