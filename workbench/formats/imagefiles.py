"""Reading source images and writing decoded ones.

Accepted: 8- and 16-bit grey, RGB and RGBA (and grey + alpha). Palette, 1-bit, CMYK and
other colour modes are converted to RGB(A) or grey by Pillow; EXIF orientation is applied.
Alpha is carried losslessly. Pillow's decompression-bomb guard stays on. 16-bit colour PNGs
(which Pillow cannot hold) are read by libpng through OpenCV and written by the small PNG
writer below (ISO/IEC 15948; neither library writes 16-bit grey + alpha);
16-bit colour TIFFs are read with tifffile.
"""

from __future__ import annotations

import hashlib
import os
import struct
import tempfile
import warnings
import zlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image, ImageOps, UnidentifiedImageError

from ..errors import InputError
from .names import IMAGE_SUFFIXES, bundle_names

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
TIFF_SIGNATURES = {b"II*\x00", b"MM\x00*", b"II+\x00", b"MM\x00+"}  # classic and BigTIFF


@dataclass
class SourceImage:
    """One image ready for coding.

    Attributes
    ----------
    name : str
        Name inside the bundle (the file name for files).
    pixels : ndarray
        (H, W) grey or (H, W, 3) RGB, dtype uint8 or uint16.
    alpha : ndarray or None
        (H, W) alpha plane of the same dtype, carried losslessly.
    """

    name: str
    pixels: np.ndarray
    alpha: np.ndarray | None = None

    def __post_init__(self):
        self.pixels, self.alpha = check_pixels(self.pixels, self.alpha, self.name)

    @property
    def bits(self) -> int:
        return 16 if self.pixels.dtype == np.uint16 else 8

    @property
    def peak(self) -> int:
        return 65535 if self.bits == 16 else 255

    @property
    def height(self) -> int:
        return self.pixels.shape[0]

    @property
    def width(self) -> int:
        return self.pixels.shape[1]

    @property
    def channels(self) -> int:
        return 1 if self.pixels.ndim == 2 else 3

    def checksum(self) -> str:
        """SHA-256 of the pixels (and alpha), independent of the file format (computed once:
        a SourceImage's arrays are treated as read-only)."""
        cached = self.__dict__.get("_checksum")
        if cached is not None:
            return cached
        h = hashlib.sha256(f"{self.pixels.shape}{self.pixels.dtype.str}".encode())
        h.update(np.ascontiguousarray(self.pixels))  # no copy: hashlib reads the buffer
        if self.alpha is not None:
            h.update(np.ascontiguousarray(self.alpha).tobytes())
        self.__dict__["_checksum"] = h.hexdigest()
        return self.__dict__["_checksum"]

    def full(self) -> np.ndarray:
        """Pixels with alpha appended as a last channel, as written to disk."""
        if self.alpha is None:
            return self.pixels
        base = self.pixels if self.pixels.ndim == 3 else self.pixels[..., None]
        return np.concatenate([base, self.alpha[..., None]], axis=-1)


MAX_SIDE = 1 << 16


def check_pixels(pixels, alpha=None, name="image"):
    """Validate and normalise an array to (H, W) or (H, W, 3) uint8/uint16 plus alpha."""
    a = np.asarray(pixels)
    if a.dtype == bool:
        a = a.astype(np.uint8) * 255
    if a.dtype not in (np.uint8, np.uint16):
        raise InputError(f"{name}: pixels must be uint8 or uint16, got dtype {a.dtype}")
    if a.ndim == 3 and a.shape[2] in (2, 4) and alpha is None:
        a, alpha = a[..., :-1], a[..., -1]
        if a.shape[2] == 1:
            a = a[..., 0]
    if a.ndim == 3 and a.shape[2] == 1:
        a = a[..., 0]
    if not (a.ndim == 2 or (a.ndim == 3 and a.shape[2] == 3)):
        raise InputError(f"{name}: expected (H, W), (H, W, 3) or (H, W, 4) pixels, got shape {a.shape}")
    if min(a.shape[:2]) < 1 or max(a.shape[:2]) > MAX_SIDE:
        raise InputError(f"{name}: image sides must be 1..{MAX_SIDE}, got {a.shape[1]}x{a.shape[0]}")
    if alpha is not None:
        alpha = np.asarray(alpha)
        if alpha.shape != a.shape[:2] or alpha.dtype != a.dtype:
            raise InputError(f"{name}: alpha must be {a.shape[:2]} {a.dtype}, got {alpha.shape} {alpha.dtype}")
        alpha = np.ascontiguousarray(alpha)
    return np.ascontiguousarray(a), alpha


def _from_pillow(im: Image.Image, name: str) -> SourceImage:
    im = ImageOps.exif_transpose(im)
    mode = im.mode
    if mode in ("I;16", "I;16L", "I;16B", "I;16N"):
        return SourceImage(name, np.asarray(im).astype(np.uint16))
    if mode == "I":
        a = np.asarray(im)
        if a.min() < 0 or a.max() > 65535:
            raise InputError(f"{name}: 32-bit integer pixels outside 0..65535 are not supported")
        return SourceImage(name, a.astype(np.uint16))
    if mode == "F":
        raise InputError(f"{name}: floating-point images are not supported (save as 16-bit integer)")
    if mode in ("1", "L"):
        return SourceImage(name, np.asarray(im.convert("L")))
    if mode == "LA":
        a = np.asarray(im)
        return SourceImage(name, a[..., 0].copy(), a[..., 1].copy())
    has_alpha = mode in ("RGBA", "PA", "La") or (mode == "P" and "transparency" in im.info)
    if has_alpha:
        a = np.asarray(im.convert("RGBA"))
        return SourceImage(name, a[..., :3].copy(), a[..., 3].copy())
    return SourceImage(name, np.asarray(im.convert("RGB")))


def read_image(path: str | os.PathLike, name: str | None = None, page: int | None = None) -> SourceImage:
    """Read one image file (``page``: one image of a multi-page TIFF).

    Raises
    ------
    InputError
        For a missing, unreadable, oversized or unsupported file, naming it.
    """
    path = Path(path)
    name = name or path.name
    try:
        with open(path, "rb") as f:
            head = f.read(32)
        if head.startswith(PNG_SIGNATURE) and _png_is_16bit_colour(path):
            return _read_png16(path, name)
        if head[:4] in TIFF_SIGNATURES and (page is not None or _tiff_is_16bit_colour(path)):
            return _read_tiff16(path, name, page or 0)
        with warnings.catch_warnings():
            # Pillow warns about damaged metadata in files it can still read; those files are
            # fine to use. The bomb warning, though, is an answer: refuse the file.
            warnings.simplefilter("ignore")
            warnings.simplefilter("error", Image.DecompressionBombWarning)
            with Image.open(path) as im:
                im.load()
                return _from_pillow(im, name)
    except InputError:
        raise
    except (Image.DecompressionBombError, Image.DecompressionBombWarning) as exc:
        raise InputError(f"{name}: refused as a possible decompression bomb ({exc})") from None
    except FileNotFoundError:
        raise InputError(f"{name}: no such file") from None
    except (UnidentifiedImageError, OSError, SyntaxError, ValueError, struct.error, zlib.error) as exc:
        raise InputError(f"{name}: not a readable image ({exc.__class__.__name__}: {exc})") from None


def list_inputs(inputs) -> list[Path]:
    """Expand files and folders (non-recursive, sorted) into image file paths."""
    out: list[Path] = []
    for item in inputs:
        p = Path(item)
        if p.is_dir():
            out.extend(sorted(q for q in p.iterdir() if q.is_file() and q.suffix.lower() in IMAGE_SUFFIXES))
        elif p.exists():
            out.append(p)
        else:
            raise InputError(f"{p}: no such file or folder")
    # The same file named twice (``a.png ./a.png``) is one image.
    seen: set[Path] = set()
    return [p for p in out if not (p.resolve() in seen or seen.add(p.resolve()))]


def read_many(inputs) -> tuple[list[SourceImage], list[tuple[str, str]]]:
    """Read files and folders; unreadable files are skipped and reported.

    Returns
    -------
    images : list of SourceImage
    skipped : list of (name, reason)
    """
    images, skipped = [], []
    paths = list_inputs(inputs)
    for path, name in zip(paths, bundle_names(paths)):
        # every page of a TIFF stack is an image of its own: ``stack.tif[0]``, ``stack.tif[1]``…
        pages = tiff_pages(path) if path.suffix.lower() in (".tif", ".tiff") else 1
        for page in range(pages) if pages > 1 else [None]:
            label = name if page is None else f"{name}[{page}]"
            try:
                images.append(read_image(path, label, page))
            except InputError as exc:
                skipped.append((label, str(exc)))
    return images, skipped


# ---------------------------------------------------------------- atomic writes


def write_atomic(path: str | os.PathLike, data: bytes, *, protect: set[Path] | None = None) -> None:
    """Write ``data`` to ``path`` through a temporary file and a rename.

    Parameters
    ----------
    protect : set of Path, optional
        Files that must never be replaced (the sources being compressed).
    """
    write_all_atomic([(path, data)], protect=protect)


def write_all_atomic(items, *, protect: set[Path] | None = None) -> None:
    """Write several files all or nothing: every file to a temporary first, then the renames.

    Parameters
    ----------
    items : iterable of (path, bytes)
        May be a generator, so that each file's bytes exist only while it is written. If
        anything fails before the renames (a full disk, an error making the next file), no
        target is touched and every temporary is removed.
    protect : set of Path, optional
        Files that must never be replaced (the sources being compressed).
    """
    protected = {p.resolve() for p in protect or ()}
    staged: list[tuple[str, Path]] = []
    try:
        for path, data in items:
            path = Path(path)
            if path.resolve() in protected:
                raise InputError(f"{path}: refusing to overwrite a source image")
            staged.append((_stage(path, data), path))
    except BaseException:
        for tmp, _ in staged:
            _unlink_quietly(tmp)
        raise
    for tmp, path in staged:
        os.replace(tmp, path)
    for folder in {path.parent for _, path in staged}:
        _sync_folder(folder)
    for _, path in staged:
        _remove_stale_parts(path)


def _stage(path: Path, data: bytes) -> str:
    """``data`` in a synced temporary file beside ``path``; returns the temporary's name."""
    path.parent.mkdir(parents=True, exist_ok=True)
    # The writer's pid in the name tells a later writer whether this temporary's owner is gone.
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.{os.getpid()}-", suffix=".part", dir=path.parent)
    umask = os.umask(0)
    os.umask(umask)
    try:
        os.chmod(tmp, 0o666 & ~umask)
        with os.fdopen(fd, "wb") as f:
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
    except BaseException:
        _unlink_quietly(tmp)
        raise
    return tmp


def _unlink_quietly(path) -> None:
    try:
        os.unlink(path)
    except FileNotFoundError:
        pass


STALE_PART_SECONDS = 600.0  # a temporary file this old belongs to a writer that was killed


def _sync_folder(folder: Path) -> None:
    """fsync the folder so the rename itself survives a power cut (POSIX; a no-op elsewhere)."""
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass  # some file systems refuse fsync on a directory
    finally:
        os.close(fd)


def _part_owner(part: Path) -> int | None:
    """The writer's pid in the name of one of our temporaries (``.NAME.PID-XXXX.part``, as
    :func:`_stage` names them), or None for a name of another shape."""
    name = part.name
    if not (name.startswith(".") and name.endswith(".part")):
        return None
    head = name[1:-len(".part")].rpartition("-")[0]  # mkstemp's random part has no '-'
    owner = head.rpartition(".")[2]
    return int(owner) if owner.isdigit() else None


def _remove_if_stale(part: Path, now: float, *, by_age: bool = True) -> None:
    owner = _part_owner(part)
    try:
        if (owner is not None and not _process_alive(owner)) or \
                (by_age and now - part.stat().st_mtime > STALE_PART_SECONDS):
            part.unlink()
    except OSError:
        pass


def _remove_stale_parts(path: Path) -> None:
    """Remove temporary files of earlier, killed writes of ``path`` (ours by their name):
    those whose writing process has ended, and any older than ``STALE_PART_SECONDS``."""
    import glob
    import time

    now = time.time()
    for part in path.parent.glob(f"{glob.escape(f'.{path.name}.')}*.part"):
        _remove_if_stale(part, now)


def remove_stale_parts_under(folder) -> None:
    """Remove, anywhere under ``folder``, the temporaries of our writes whose writer has
    ended. A batch's last step: a write killed mid-way can belong to a worker that was still
    exiting when a rerun wrote the same file again, and so was left then."""
    import time

    now = time.time()
    for part in Path(folder).rglob(".*.part"):
        if _part_owner(part) is not None:
            _remove_if_stale(part, now, by_age=False)


def _process_alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except (PermissionError, OSError):
        return True  # someone else's process, or no way to tell: keep the file
    return not _ended_unreaped(pid)


def _ended_unreaped(pid: int) -> bool:
    """Whether ``pid`` has ended but not been reaped yet (a zombie; Linux's /proc, else False)."""
    try:
        with open(f"/proc/{pid}/stat", "rb") as f:
            stat = f.read()
    except OSError:
        return False
    end = stat.rfind(b")")  # the state follows the command name, which may hold ')' itself
    return stat[end + 2:end + 3] == b"Z"


def encode_png(pixels: np.ndarray) -> bytes:
    """PNG bytes of (H, W[, C]) uint8/uint16 pixels, C in 1..4 (grey, grey+alpha, RGB, RGBA).

    8-bit images go through Pillow, 16-bit grey, RGB and RGBA through OpenCV. Neither writes 16-bit
    grey + alpha (PNG colour type 4), so that one is written here: one IDAT of unfiltered rows."""
    a = np.asarray(pixels)
    if a.ndim == 2:
        a = a[..., None]
    if a.dtype == np.uint8 and a.shape[2] != 2:
        import io

        buf = io.BytesIO()
        Image.fromarray(a[..., 0] if a.shape[2] == 1 else a).save(buf, format="PNG")
        return buf.getvalue()
    if a.dtype == np.uint16 and a.shape[2] != 2:
        import cv2

        bgr = a[..., 0] if a.shape[2] == 1 else cv2.cvtColor(a, cv2.COLOR_RGB2BGR if a.shape[2] == 3
                                                             else cv2.COLOR_RGBA2BGRA)
        ok, buf = cv2.imencode(".png", np.ascontiguousarray(bgr), [cv2.IMWRITE_PNG_COMPRESSION, 6])
        if not ok:
            raise InputError(f"OpenCV could not write a {a.shape} 16-bit PNG")
        return buf.tobytes()
    h, w, c = a.shape
    colour_type = {1: 0, 2: 4, 3: 2, 4: 6}[c]
    depth = 16 if a.dtype == np.uint16 else 8
    raw = a.astype(">u2" if depth == 16 else "u1").reshape(h, -1).view(np.uint8)
    rows = np.concatenate([np.zeros((h, 1), np.uint8), raw], axis=1)  # filter type 0 per row

    def chunk(tag: bytes, body: bytes) -> bytes:
        return struct.pack(">I", len(body)) + tag + body + struct.pack(">I", zlib.crc32(tag + body))

    ihdr = struct.pack(">IIBBBBB", w, h, depth, colour_type, 0, 0, 0)
    return PNG_SIGNATURE + chunk(b"IHDR", ihdr) + chunk(b"IDAT", zlib.compress(rows.tobytes(), 6)) + chunk(b"IEND", b"")


def _tiff_is_16bit_colour(path: Path) -> bool:
    import tifffile

    try:
        with tifffile.TiffFile(path) as t:
            page = t.pages[0]
            return page.bitspersample == 16 and page.samplesperpixel >= 3
    except Exception:  # noqa: BLE001 - a damaged TIFF: Pillow's reading below says what is wrong
        return False


def tiff_pages(path: Path) -> int:
    """How many images a TIFF file holds (0 if tifffile cannot read it)."""
    import tifffile

    try:
        with tifffile.TiffFile(path) as t:
            return len(t.pages)
    except Exception:  # noqa: BLE001 - a damaged TIFF: Pillow's reading says what is wrong
        return 0


def _read_tiff16(path: Path, name: str, index: int = 0) -> SourceImage:
    """One image of a TIFF through tifffile: 16-bit colour (Pillow reads it as 8-bit) and
    every page of a stack. Grey, grey + alpha, RGB and RGBA; 8- or 16-bit."""
    import tifffile

    with tifffile.TiffFile(path) as t:
        page = t.pages[index]
        h, w, n = page.imagelength, page.imagewidth, page.samplesperpixel
        if h * w > Image.MAX_IMAGE_PIXELS:
            raise InputError(f"{name}: refused as a possible decompression bomb ({w}x{h})")
        if n > 4:
            raise InputError(f"{name}: {n} samples per pixel; only grey, RGB and RGBA TIFFs are supported")
        try:
            a = page.asarray()
        except Exception as exc:  # noqa: BLE001 - tifffile and its codecs raise many kinds
            raise InputError(f"{name}: not a readable TIFF ({exc.__class__.__name__}: {exc})") from None
    if a.dtype not in (np.uint8, np.uint16):
        raise InputError(f"{name}: {a.dtype} TIFF samples are not supported (unsigned 8- or 16-bit expected)")
    if n > 1 and a.ndim == 3 and a.shape[0] == n and a.shape[-1] != n:  # planar (one plane per sample)
        a = np.moveaxis(a, 0, -1)
    if a.shape != ((h, w) if n == 1 else (h, w, n)):
        raise InputError(f"{name}: TIFF image data has shape {a.shape}, expected {(h, w, n)}")
    if n in (2, 4):
        return SourceImage(name, a[..., : n - 1].copy() if n == 4 else a[..., 0].copy(), a[..., -1].copy())
    return SourceImage(name, a)


def _png_is_16bit_colour(path: Path) -> bool:
    with open(path, "rb") as f:
        head = f.read(33)
    if len(head) < 33 or head[12:16] != b"IHDR":
        return False
    depth, colour_type = head[24], head[25]
    return depth == 16 and colour_type in (2, 4, 6)


def _read_png16(path: Path, name: str) -> SourceImage:
    """16-bit colour PNG (Pillow cannot hold it): decoded by libpng through OpenCV."""
    import cv2

    with open(path, "rb") as f:
        head = f.read(33)
    w, h = struct.unpack(">II", head[16:24])
    colour_type = head[25]
    if w * h > 2 * Image.MAX_IMAGE_PIXELS:
        raise InputError(f"{name}: refused as a possible decompression bomb ({w}x{h})")
    a = cv2.imdecode(np.fromfile(path, np.uint8), cv2.IMREAD_UNCHANGED)
    if a is None or a.dtype != np.uint16 or a.shape[:2] != (h, w):
        raise InputError(f"{name}: not a readable 16-bit PNG")
    if colour_type == 4:  # grey + alpha arrives as BGRA with the grey repeated
        return SourceImage(name, a[..., 0].copy(), a[..., 3].copy())
    if a.ndim == 3 and a.shape[2] == 4:
        return SourceImage(name, np.ascontiguousarray(a[..., 2::-1]), a[..., 3].copy())
    return SourceImage(name, np.ascontiguousarray(a[..., ::-1]))
