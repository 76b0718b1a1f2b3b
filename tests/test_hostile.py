"""Hostile bundles, names and faults: every reader total, every output all or nothing.

Hand-made files keep valid CRCs, so they reach the metadata parser rather than stopping at
the container's checks. The pixel budget follows the idea of Pillow's decompression-bomb
limit (``Image.MAX_IMAGE_PIXELS``): refuse up front what a small file cannot honestly hold.
"""

import os
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

import workbench
from workbench import cli, pipeline
from workbench.formats import bundle, container
from workbench.errors import BundleError, InputError
from workbench.formats.imagefiles import SourceImage
from workbench.formats.names import bundle_names, output_paths
from workbench.settings import Settings


@pytest.fixture(scope="module")
def small():
    """A small real bundle made from a crop of scikit-image's 'camera'."""
    from skimage import data

    return workbench.compress({"s.png": data.camera()[:48, :64]}, step=4)


def _with_meta(data: bytes, edit) -> bytes:
    chunks = container.unpack(data, bundle.MAGIC, (bundle.VERSION,), "b")
    meta = container.unpack_json(chunks[0][1], "b")
    body = edit(meta) if callable(edit) else edit
    raw = body if isinstance(body, bytes) else container.pack_json(body)
    return container.pack(bundle.MAGIC, bundle.VERSION, [(b"META", raw)] + chunks[1:])


def _settings(**kw):
    return lambda m: {**m, "settings": {**m["settings"], **kw}}


def _entry(**kw):
    return lambda m: {**m, "images": [{**m["images"][0], **kw}]}


@pytest.mark.parametrize("edit", [
    _settings(block=8.0), _settings(count=float("inf")), _settings(count=10**400),
    _settings(step=float("inf")), _settings(step=10**400), _settings(step=float("nan")),
    _settings(latent=True), _settings(target=["psnr", {}]), _settings(target="psnr"),
    _settings(deadzone=None), _settings(colour="yes"),
    _entry(width=8.0), _entry(name="\ud800.png"), _entry(name=""), _entry(extra=1), _entry(bits=True),
    lambda m: {**m, "surplus": []},
    lambda m: {**m, "tool": 3},
], ids=lambda e: "")
def test_every_malformed_metadata_field_is_a_bundle_error(small, edit):
    with pytest.raises(BundleError):
        bundle.parse(_with_meta(small, edit))


def test_deeply_nested_metadata_is_refused_not_a_recursion_error(small):
    import zlib

    with pytest.raises(BundleError, match="nested too deeply"):
        bundle.parse(_with_meta(small, zlib.compress(b"[" * 100_000)))


def test_a_five_thousand_digit_number_is_a_bundle_error(small):
    # CPython limits int-from-text conversion to 4,300 digits (Python docs, "Integer string
    # conversion length limitation"); json raises a bare ValueError beyond it.
    import zlib

    with pytest.raises(BundleError, match="unreadable"):
        bundle.parse(_with_meta(small, zlib.compress(b'{"format":"wbundle","x":' + b"9" * 5000 + b"}")))


def test_huge_declared_images_are_refused_by_the_pixel_budget_before_any_work(small):
    many = _with_meta(small, lambda m: {**m, "images": [{**m["images"][0], "name": f"{i}", "width": 16384,
                                                         "height": 8192} for i in range(3)]})
    with pytest.raises(BundleError, match="pixels in all"):
        bundle.parse(many)
    assert len(bundle.parse(many, max_pixels=3 * 16384 * 8192).entries) == 3


def test_too_many_entries_are_refused(small):
    edit = lambda m: {**m, "images": [{**m["images"][0], "name": f"{i}"} for i in range(bundle.MAX_IMAGES + 1)]}
    with pytest.raises(BundleError, match="at most"):
        bundle.parse(_with_meta(small, edit))


def test_the_encoder_refuses_what_the_decoder_would_refuse_before_coding():
    wide = SourceImage("wide.png", np.zeros((3, 1 << 16), np.uint8))
    other = SourceImage("other.png", wide.pixels)
    with pytest.raises(InputError, match="pixels in all"):
        pipeline.encode([wide, other], Settings(), max_pixels=(1 << 16) * 5)
    with pytest.raises(InputError, match="used twice"):
        pipeline.encode([wide, wide], Settings())


@pytest.mark.parametrize("shape", [(1, 1), (8, 8), (1, 1, 3), (2, 300)])
def test_tiny_images_encode_and_decode(shape):
    from skimage import data

    src = data.astronaut()[: shape[0], : shape[1]]
    src = src if len(shape) == 3 else src[..., 1]
    out = workbench.decompress(workbench.compress({"t": src}, step=1))["t"]
    assert out.shape == src.shape
    assert np.abs(out.astype(int) - src).max() <= 3  # step 1: a few grey levels at most (our own threshold)


def test_sources_with_one_file_name_in_different_folders_get_distinct_names():
    paths = [Path("p/q/x.png"), Path("r/q/x.png"), Path("s/q/x.png"), Path("y.png")]
    assert bundle_names(paths) == ["p/q/x.png", "r/q/x.png", "s/q/x.png", "y.png"]


def test_undecodable_file_name_bytes_become_a_storable_name():
    name = bundle_names([Path(os.fsdecode(b"caf\xe9.png"))])[0]
    assert name == "caf\ufffd.png"
    name.encode("utf-8")


@pytest.mark.parametrize("names, expected", [
    (["x.png", "b/x.png"], ["x.png", "b/x.png"]),
    (["a.png", "a.jpg", "a"], ["a.png", "a-2.png", "a-3.png"]),
    ([".", "/"], ["image.png", "image-2.png"]),
    (["C:\\evil\\x.png"], ["C_/evil/x.png"]),
    (["new\nline.png"], ["new_line.png"]),
    (["../../etc/passwd"], ["etc/passwd.png"]),
    (["A.png", "a.PNG"], ["A.png", "a-2.png"]),
    (["con.tif"], ["_con.png"]),
])
def test_decoded_names_are_safe_unique_and_stable(names, expected):
    assert [str(p) for p in output_paths(names)] == expected


def test_decode_of_same_named_files_from_two_folders_writes_both(tmp_path, capsys):
    from skimage import data

    for sub, img in (("a", data.camera()[:64, :64]), ("b", data.camera()[64:128, :64])):
        (tmp_path / sub).mkdir()
        Image.fromarray(img).save(tmp_path / sub / "x.png")
    out = tmp_path / "x.wbundle"
    assert cli.main(["encode", str(tmp_path / "a" / "x.png"), str(tmp_path / "b" / "x.png"), "-o", str(out)]) == 0
    assert cli.main(["decode", str(out), "-o", str(tmp_path / "dec")]) == 0
    written = sorted(p.relative_to(tmp_path / "dec").as_posix() for p in (tmp_path / "dec").rglob("*.png"))
    assert written == ["a/x.png", "b/x.png"]
    a, b = (np.asarray(Image.open(tmp_path / "dec" / s / "x.png")) for s in "ab")
    assert not np.array_equal(a, b)


def test_decode_that_fails_midway_leaves_the_output_folder_untouched(tmp_path, monkeypatch, capsys):
    from skimage import data

    from workbench.formats import imagefiles

    for i in range(3):
        Image.fromarray(data.camera()[64 * i: 64 * i + 64, :64]).save(tmp_path / f"{i}.png")
    out = tmp_path / "x.wbundle"
    assert cli.main(["encode", *[str(tmp_path / f"{i}.png") for i in range(3)], "-o", str(out)]) == 0
    real, calls = imagefiles._stage, []

    def full_disk(path, data):
        calls.append(path)
        if len(calls) == 3:
            raise OSError(28, "No space left on device")
        return real(path, data)

    monkeypatch.setattr(imagefiles, "_stage", full_disk)
    dec = tmp_path / "dec"
    assert cli.main(["decode", str(out), "-o", str(dec)]) == 2
    assert "No space left" in capsys.readouterr().err
    assert not dec.exists() or list(dec.iterdir()) == []
    monkeypatch.setattr(imagefiles, "_stage", real)
    assert cli.main(["decode", str(out), "-o", str(dec)]) == 0  # the rerun completes
    assert sorted(p.name for p in dec.iterdir()) == ["0.png", "1.png", "2.png"]
