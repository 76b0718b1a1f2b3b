"""Image input: modes, bit depths, orientation, the bomb guard, folder mode."""

import os
import sys

import numpy as np
import pytest
from PIL import Image

from workbench.formats import imagefiles
from workbench.errors import InputError


def _save(tmp_path, name, im, **kw):
    p = tmp_path / name
    im.save(p, **kw)
    return p


def test_rgb_and_grey_are_read_as_uint8(tmp_path, astronaut, camera):
    a = imagefiles.read_image(_save(tmp_path, "a.png", Image.fromarray(astronaut)))
    c = imagefiles.read_image(_save(tmp_path, "c.png", Image.fromarray(camera)))
    assert np.array_equal(a.pixels, astronaut) and np.array_equal(c.pixels, camera)
    assert a.bits == 8 and a.channels == 3 and c.channels == 1


def test_16bit_grey_png_keeps_all_bits(tmp_path, camera16):
    p = tmp_path / "g16.png"
    p.write_bytes(imagefiles.encode_png(camera16))
    img = imagefiles.read_image(p)
    assert img.pixels.dtype == np.uint16 and np.array_equal(img.pixels, camera16)


def test_16bit_rgb_png_written_and_read_back(tmp_path, camera16):
    rgb16 = np.dstack([camera16, camera16[::-1], camera16[:, ::-1]])
    p = tmp_path / "c16.png"
    p.write_bytes(imagefiles.encode_png(rgb16))
    assert np.array_equal(imagefiles.read_image(p).pixels, rgb16)


def test_16bit_png_from_pillow_decodes_like_pillow(tmp_path, camera16):
    p = _save(tmp_path, "p16.png", Image.fromarray(camera16))
    assert np.array_equal(imagefiles.read_image(p).pixels, np.asarray(Image.open(p)))


def test_rgba_keeps_alpha_separately(tmp_path, astronaut):
    alpha = (np.arange(512 * 512) % 256).astype(np.uint8).reshape(512, 512)
    p = _save(tmp_path, "a.png", Image.fromarray(np.dstack([astronaut, alpha])))
    img = imagefiles.read_image(p)
    assert np.array_equal(img.alpha, alpha) and np.array_equal(img.pixels, astronaut)


def test_palette_and_cmyk_are_converted_to_rgb(tmp_path, astronaut):
    pal = Image.fromarray(astronaut).quantize(64)
    p = imagefiles.read_image(_save(tmp_path, "p.png", pal))
    assert p.channels == 3 and np.array_equal(p.pixels, np.asarray(pal.convert("RGB")))
    cmyk = Image.fromarray(astronaut).convert("CMYK")
    c = imagefiles.read_image(_save(tmp_path, "c.jpg", cmyk, quality=95))
    assert c.channels == 3 and c.pixels.shape == astronaut.shape


def test_exif_orientation_is_applied(tmp_path):
    img = np.zeros((20, 40), np.uint8)
    img[:, :5] = 255  # a white band at the left edge
    im = Image.fromarray(img)
    exif = im.getexif()
    exif[0x0112] = 6  # EXIF/TIFF orientation 6: rotate 90 degrees clockwise to display
    p = _save(tmp_path, "o.jpg", im, exif=exif, quality=95)
    out = imagefiles.read_image(p).pixels
    assert out.shape == (40, 20) and out[:5].mean() > 200


def test_decompression_bomb_guard_is_kept(tmp_path, monkeypatch, camera):
    p = _save(tmp_path, "big.png", Image.fromarray(camera))
    monkeypatch.setattr(Image, "MAX_IMAGE_PIXELS", 1000)
    with pytest.raises(InputError, match="decompression bomb"):
        imagefiles.read_image(p)


def test_unreadable_file_is_reported_by_name_and_skipped(tmp_path, camera):
    _save(tmp_path, "good.png", Image.fromarray(camera))
    (tmp_path / "broken.png").write_bytes(b"\x89PNG\r\n\x1a\nnot really")
    images, skipped = imagefiles.read_many([tmp_path])
    assert [i.name for i in images] == ["good.png"]
    assert skipped[0][0] == "broken.png" and "broken.png" in skipped[0][1]


def test_float_images_are_refused_with_a_reason(tmp_path):
    p = _save(tmp_path, "f.tif", Image.fromarray(np.zeros((4, 4), np.float32)))
    with pytest.raises(InputError, match="floating-point"):
        imagefiles.read_image(p)


def test_missing_path_is_an_input_error(tmp_path):
    with pytest.raises(InputError, match="no such file"):
        imagefiles.read_many([tmp_path / "nope"])


def test_atomic_write_refuses_to_replace_a_source(tmp_path, camera):
    p = _save(tmp_path, "src.png", Image.fromarray(camera))
    before = p.read_bytes()
    with pytest.raises(InputError, match="source image"):
        imagefiles.write_atomic(p, b"xx", protect={p})
    assert p.read_bytes() == before


def test_a_write_that_fails_after_its_temporary_exists_keeps_the_old_file(tmp_path, monkeypatch):
    import os

    target = tmp_path / "x.wbundle"
    target.write_bytes(b"old")

    def no_space(fd):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, "fsync", no_space)  # fails once the temporary holds the data
    with pytest.raises(OSError, match="No space"):
        imagefiles.write_atomic(target, b"new")
    assert target.read_bytes() == b"old"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["x.wbundle"]


def test_atomic_write_removes_stale_temporaries_of_a_killed_writer(tmp_path):
    # A writer killed between creating its temporary file and the rename leaves it behind;
    # the next successful write of that name removes ours once they are clearly stale, and
    # keeps a fresh one (a writer that may still be running).
    import os
    import time

    target = tmp_path / "x.wbundle"
    stale, fresh = tmp_path / ".x.wbundle.abc.part", tmp_path / ".x.wbundle.def.part"
    stale.write_bytes(b"half")
    fresh.write_bytes(b"half")
    old = time.time() - imagefiles.STALE_PART_SECONDS - 60
    os.utime(stale, (old, old))
    imagefiles.write_atomic(target, b"new")
    assert target.read_bytes() == b"new"
    assert not stale.exists() and fresh.exists()


def test_atomic_write_removes_at_once_the_temporary_of_a_writer_that_has_ended(tmp_path):
    import subprocess
    import sys

    ended = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True, text=True)
    dead = int(ended.stdout)
    target = tmp_path / "x.wbundle"
    orphan = tmp_path / f".x.wbundle.{dead}-k3j2.part"
    live = tmp_path / f".x.wbundle.{os.getppid()}-q9z1.part"  # a writer still running (our parent)
    orphan.write_bytes(b"half")
    live.write_bytes(b"half")
    imagefiles.write_atomic(target, b"new")
    assert not orphan.exists() and live.exists()


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="/proc")
def test_a_writer_that_has_ended_but_is_not_yet_reaped_counts_as_ended(tmp_path):
    # A killed worker can linger as a zombie (ended, not yet reaped by its parent) while a
    # rerun writes the same file; its temporary is removed all the same.
    import subprocess
    import time

    child = subprocess.Popen([sys.executable, "-c", "pass"])  # not waited for: a zombie once it ends
    deadline = time.monotonic() + 30
    while not imagefiles._ended_unreaped(child.pid) and time.monotonic() < deadline:
        time.sleep(0.01)
    target = tmp_path / "x.wbundle"
    orphan = tmp_path / f".x.wbundle.{child.pid}-k3j2.part"
    orphan.write_bytes(b"half")
    imagefiles.write_atomic(target, b"new")
    assert not orphan.exists()
    child.wait()


def test_a_sweep_under_a_folder_removes_only_our_temporaries_of_ended_writers(tmp_path):
    import os
    import subprocess

    dead = int(subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"],
                              capture_output=True, text=True).stdout)
    (tmp_path / "a" / "b").mkdir(parents=True)
    orphan = tmp_path / "a" / "b" / f".f03.png.wbundle.{dead}-mcnexrmv.part"
    live = tmp_path / "a" / f".g.wbundle.{os.getppid()}-q9z1.part"
    foreign = tmp_path / "a" / ".someone-elses.part"
    for p in (orphan, live, foreign):
        p.write_bytes(b"half")
    imagefiles.remove_stale_parts_under(tmp_path)
    assert not orphan.exists() and live.exists() and foreign.exists()


# ----------------------------------------------------- files written by other encoders


def _rgb16(astronaut):
    """scikit-image's 'astronaut' spread to 16 bits with low bits that matter."""
    rng = np.random.default_rng(5)
    return (astronaut[:96, :128].astype(np.uint16) * 257 + rng.integers(0, 250, (96, 128, 3))).astype(np.uint16)


def _alpha16(shape):
    return np.linspace(0, 65535, shape[0] * shape[1]).reshape(shape).astype(np.uint16)


def _cv2_write(path, rgb, alpha=None):
    import cv2  # OpenCV stores colour as BGR(A)

    px = rgb[..., ::-1] if alpha is None else np.dstack([rgb[..., ::-1], alpha])
    assert cv2.imwrite(str(path), np.ascontiguousarray(px))


def _tifffile_write(path, rgb, alpha=None, **kw):
    import tifffile

    px = rgb if alpha is None else np.dstack([rgb, alpha])
    tifffile.imwrite(path, px, photometric="rgb", extrasamples=[] if alpha is None else ["unassalpha"], **kw)


@pytest.mark.parametrize("writer, suffix, with_alpha", [
    (_cv2_write, ".png", False), (_cv2_write, ".png", True), (_cv2_write, ".tif", False), (_cv2_write, ".tif", True),
    (_tifffile_write, ".tif", False), (_tifffile_write, ".tif", True),
    (lambda p, rgb, alpha=None: _tifffile_write(p, rgb, alpha, compression="zlib"), ".tif", False),
], ids=["cv2-png", "cv2-png-alpha", "cv2-tif-lzw", "cv2-tif-alpha", "tifffile", "tifffile-alpha", "tifffile-zlib"])
def test_16bit_colour_files_of_other_encoders_keep_every_bit(tmp_path, astronaut, writer, suffix, with_alpha):
    rgb = _rgb16(astronaut)
    alpha = _alpha16(rgb.shape[:2]) if with_alpha else None
    p = tmp_path / f"x{suffix}"
    writer(p, rgb, alpha)
    img = imagefiles.read_image(p)
    assert img.pixels.dtype == np.uint16 and np.array_equal(img.pixels, rgb)
    assert (img.alpha is None) if alpha is None else np.array_equal(img.alpha, alpha)


def test_planar_16bit_tiff_is_read_in_pixel_order(tmp_path, astronaut):
    import tifffile

    rgb = _rgb16(astronaut)
    tifffile.imwrite(tmp_path / "p.tif", np.moveaxis(rgb, -1, 0), photometric="rgb", planarconfig="separate")
    assert np.array_equal(imagefiles.read_image(tmp_path / "p.tif").pixels, rgb)


def _png_with_filter(rgb16: np.ndarray, ftype: int) -> bytes:
    """A 16-bit RGB PNG whose every row uses filter ``ftype``: the five filters as defined in
    ISO/IEC 15948 (PNG), section 9.2, worked on bytes with bpp = 6."""
    h, w, _ = rgb16.shape
    raw = rgb16.astype(">u2").tobytes()
    stride, bpp = w * 6, 6
    out, prev = bytearray(), bytes(stride)
    for y in range(h):
        line = raw[y * stride:(y + 1) * stride]
        f = bytearray(stride)
        for i in range(stride):
            a = line[i - bpp] if i >= bpp else 0
            b = prev[i]
            c = prev[i - bpp] if i >= bpp else 0
            if ftype == 0:
                pred = 0
            elif ftype == 1:
                pred = a
            elif ftype == 2:
                pred = b
            elif ftype == 3:
                pred = (a + b) // 2
            else:
                p = a + b - c
                pa, pb, pc = abs(p - a), abs(p - b), abs(p - c)
                pred = a if pa <= pb and pa <= pc else (b if pb <= pc else c)
            f[i] = (line[i] - pred) & 0xFF
        out += bytes([ftype]) + f
        prev = line
    import struct
    import zlib

    def chunk(tag, body):
        return struct.pack(">I", len(body)) + tag + body + struct.pack(">I", zlib.crc32(tag + body))

    ihdr = struct.pack(">IIBBBBB", w, h, 16, 2, 0, 0, 0)
    return (imagefiles.PNG_SIGNATURE + chunk(b"IHDR", ihdr) + chunk(b"IDAT", zlib.compress(bytes(out)))
            + chunk(b"IEND", b""))


@pytest.mark.parametrize("ftype", [0, 1, 2, 3, 4], ids=["none", "sub", "up", "average", "paeth"])
def test_every_png_filter_type_reads_as_opencv_reads_it(tmp_path, astronaut, ftype):
    import cv2

    rgb = _rgb16(astronaut)[:24, :40]
    p = tmp_path / "f.png"
    p.write_bytes(_png_with_filter(rgb, ftype))
    reference = cv2.imread(str(p), cv2.IMREAD_UNCHANGED)[..., ::-1]  # libpng through OpenCV
    assert np.array_equal(reference, rgb)
    assert np.array_equal(imagefiles.read_image(p).pixels, rgb)


def test_grey_with_alpha_from_pillow_keeps_both_planes(tmp_path, camera):
    alpha = (np.arange(camera.size) % 251).reshape(camera.shape).astype(np.uint8)
    p = _save(tmp_path, "la.png", Image.fromarray(np.dstack([camera, alpha]), "LA"))
    img = imagefiles.read_image(p)
    assert np.array_equal(img.pixels, camera) and np.array_equal(img.alpha, alpha)


def test_every_page_of_a_tiff_stack_is_an_image_of_its_own(tmp_path, camera16):
    import tifffile

    stack = np.stack([camera16[:64, :80] + i for i in range(3)])
    tifffile.imwrite(tmp_path / "stack.tif", stack, photometric="minisblack")  # three pages
    images, skipped = imagefiles.read_many([tmp_path / "stack.tif"])
    assert [i.name for i in images] == ["stack.tif[0]", "stack.tif[1]", "stack.tif[2]"] and not skipped
    for i, img in enumerate(images):
        assert img.pixels.dtype == np.uint16 and np.array_equal(img.pixels, stack[i])


def test_a_stack_decodes_to_one_png_per_page(tmp_path, camera16, capsys):
    import tifffile

    from workbench import cli

    tifffile.imwrite(tmp_path / "s.tif", np.stack([camera16[:48, :48]] * 2), photometric="minisblack")
    assert cli.main(["encode", str(tmp_path / "s.tif"), "-o", str(tmp_path / "s.wbundle")]) == 0
    assert cli.main(["decode", str(tmp_path / "s.wbundle"), "-o", str(tmp_path / "out")]) == 0
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == ["s[0].png", "s[1].png"]


def test_16bit_grey_alpha_png_of_our_own_writer_reads_in_opencv(camera16):
    # The one layout neither Pillow nor OpenCV writes; OpenCV's reader (libpng) is the check.
    import cv2

    ga = np.dstack([camera16, camera16[::-1]])
    back = cv2.imdecode(np.frombuffer(imagefiles.encode_png(ga), np.uint8), cv2.IMREAD_UNCHANGED)
    assert back.dtype == np.uint16
    grey, alpha = (back[..., 0], back[..., 3]) if back.ndim == 3 and back.shape[2] == 4 else (back[..., 0], back[..., 1])
    assert np.array_equal(grey, camera16) and np.array_equal(alpha, camera16[::-1])


def test_16bit_rgba_png_is_written_by_opencv_in_rgb_order(camera16):
    import cv2

    rgba = np.dstack([camera16, camera16[::-1], camera16[:, ::-1], camera16.T[:camera16.shape[0], :camera16.shape[1]]])
    back = cv2.imdecode(np.frombuffer(imagefiles.encode_png(rgba), np.uint8), cv2.IMREAD_UNCHANGED)
    assert np.array_equal(cv2.cvtColor(back, cv2.COLOR_BGRA2RGBA), rgba)
