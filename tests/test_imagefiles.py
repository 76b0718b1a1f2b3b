"""Image input: modes, bit depths, orientation, the bomb guard, folder mode."""

import numpy as np
import pytest
from PIL import Image

from workbench import imagefiles
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
