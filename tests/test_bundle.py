"""Bundles: exact round trips and safe reading of damaged or hand-made files."""

import struct
import zlib

import numpy as np
import pytest

import workbench
from workbench import pipeline
from workbench.formats import bundle, container
from workbench.errors import BundleError
from workbench.formats.imagefiles import SourceImage
from workbench.settings import Settings


def _encode(arrays, **kw):
    images = [SourceImage(n, a) for n, a in arrays.items()]
    return pipeline.encode(images, Settings(**kw))


@pytest.mark.parametrize("name", ["camera", "astronaut", "chelsea", "camera16"])
def test_decoded_bundle_equals_in_process_reconstruction_bit_for_bit(name, request):
    img = request.getfixturevalue(name)
    result = _encode({name: img}, step=6.0)
    decoded = workbench.decompress(result.data)[name]
    assert decoded.dtype == img.dtype and decoded.shape == img.shape
    assert np.array_equal(decoded, result.images[0].reconstruction)


def test_alpha_is_carried_losslessly(astronaut):
    rng = np.random.default_rng(0)
    alpha = rng.integers(0, 256, astronaut.shape[:2]).astype(np.uint8)
    rgba = np.dstack([astronaut, alpha])
    out = workbench.decompress(workbench.compress({"a": rgba}, step=10))["a"]
    assert out.shape == rgba.shape and np.array_equal(out[..., 3], alpha)


def test_every_byte_is_counted_in_the_rate(astronaut, camera):
    result = _encode({"a": astronaut, "c": camera}, step=8)
    total_bits = sum(r.bpp * r.pixels for r in result.images)
    assert total_bits == pytest.approx(8 * len(result.data))


def test_encoding_is_deterministic(chelsea):
    assert workbench.compress([chelsea], step=5) == workbench.compress([chelsea], step=5)


def test_folder_basis_is_stored_once_and_round_trips(astronaut, chelsea):
    result = _encode({"a": astronaut, "b": chelsea}, step=6, basis_scope="folder")
    c = bundle.parse(result.data)
    assert c.shared is not None
    out = workbench.decompress(result.data)
    assert np.array_equal(out["b"], result.images[1].reconstruction)


def test_components_limit_what_is_kept(camera):
    few = _encode({"c": camera}, step=2, count=3)
    many = _encode({"c": camera}, step=2, count=40)
    assert few.images[0].kept <= 3 < many.images[0].kept
    assert few.size < many.size and few.images[0].psnr < many.images[0].psnr


@pytest.mark.parametrize("block", [4, 16, 32])
def test_other_block_sizes_round_trip(block, chelsea):
    result = _encode({"c": chelsea}, step=6, block=block)
    assert np.array_equal(workbench.decompress(result.data)["c"], result.images[0].reconstruction)


def test_444_round_trips(chelsea):
    result = _encode({"c": chelsea}, step=6, chroma="444")
    assert np.array_equal(workbench.decompress(result.data)["c"], result.images[0].reconstruction)


@pytest.fixture(scope="module")
def small_bundle():
    rng = np.random.default_rng(3)
    img = np.clip(np.cumsum(rng.integers(-3, 4, (40, 56, 3)), axis=1) + 100, 0, 255).astype(np.uint8)
    return workbench.compress({"s": img}, step=4)


def test_every_truncation_raises_bundle_error(small_bundle):
    for n in range(0, len(small_bundle), max(1, len(small_bundle) // 300)):
        with pytest.raises(BundleError):
            workbench.decompress(small_bundle[:n])


def test_every_single_bit_flip_in_the_header_and_table_is_caught(small_bundle):
    for i in range(container.HEADER.size + 4 * container.ENTRY.size):
        for bit in (0, 3, 7):
            bad = bytearray(small_bundle)
            bad[i] ^= 1 << bit
            with pytest.raises(BundleError):
                workbench.decompress(bytes(bad))


def test_random_mutations_give_only_bundle_errors(small_bundle):
    # Fuzz-style: random byte edits, insertions and deletions anywhere in a valid bundle.
    rng = np.random.default_rng(11)
    for _ in range(400):
        bad = bytearray(small_bundle)
        for _ in range(rng.integers(1, 4)):
            op, pos = rng.integers(0, 3), int(rng.integers(0, len(bad)))
            if op == 0:
                bad[pos] = int(rng.integers(0, 256))
            elif op == 1:
                bad.insert(pos, int(rng.integers(0, 256)))
            else:
                del bad[pos]
        if bytes(bad) == small_bundle:
            continue
        with pytest.raises(BundleError):
            workbench.decompress(bytes(bad))


def _rebuild(data, edit_meta=None, edit_payload=None):
    """A hand-made bundle: valid CRCs around edited content."""
    chunks = container.unpack(data, bundle.MAGIC, (bundle.VERSION,), "b")
    out = []
    for tag, body in chunks:
        if tag == b"META" and edit_meta:
            body = container.pack_json(edit_meta(container.unpack_json(body, "b")))
        if tag == bundle.TAGS[bundle.VERSION][0] and edit_payload:
            body = edit_payload(body)
        out.append((tag, body))
    return container.pack(bundle.MAGIC, bundle.VERSION, out)


@pytest.mark.parametrize("edit", [
    lambda m: {**m, "images": [{**m["images"][0], "width": 10**9}]},
    lambda m: {**m, "images": [{**m["images"][0], "chunk": 99}]},
    lambda m: {**m, "images": [{**m["images"][0], "bits": 12}]},
    lambda m: {**m, "settings": {**m["settings"], "block": 7}},
    lambda m: {**m, "settings": {**m["settings"], "method": "nope"}},
    lambda m: {**m, "images": "x"},
    lambda m: [1, 2],
])
def test_hand_made_metadata_is_refused_with_a_clear_error(small_bundle, edit):
    with pytest.raises(BundleError):
        workbench.decompress(_rebuild(small_bundle, edit_meta=edit))


@pytest.mark.parametrize("edit, why", [
    (lambda p: p[:5], "truncated"),
    (lambda p: struct.pack("<fHB", float("nan"), 1, 1) + p[7:], "invalid step"),
    (lambda p: struct.pack("<fHB", 1.0, 60000, 1) + p[7:], "components"),
])
def test_hand_made_payloads_with_impossible_headers_are_refused(small_bundle, edit, why):
    with pytest.raises(BundleError, match=why):
        workbench.decompress(_rebuild(small_bundle, edit_payload=edit))


def test_hand_made_payload_with_garbled_coded_bytes_still_decodes_to_the_declared_shape(small_bundle):
    # Arithmetic-coded bytes carry no redundancy to check (the chunk CRC is what catches
    # accidents, and this file's CRCs are valid): the decoder must stay total, not detect it.
    out = workbench.decompress(_rebuild(small_bundle, edit_payload=lambda p: p[:-7] + b"\xff" * 7))["s"]
    assert out.shape == (40, 56, 3) and out.dtype == np.uint8


def test_padding_after_a_payload_is_ignored(small_bundle):
    padded = workbench.decompress(_rebuild(small_bundle, edit_payload=lambda p: p + b"\x00" * 100))["s"]
    assert np.array_equal(padded, workbench.decompress(small_bundle)["s"])


def test_metadata_bomb_is_refused(small_bundle):
    bomb = zlib.compress(b" " * (container.MAX_JSON + 10))
    data = container.pack(bundle.MAGIC, bundle.VERSION, [(b"META", bomb)])
    with pytest.raises(BundleError, match="larger than"):
        bundle.parse(data)


def test_other_files_are_not_taken_for_bundles(camera):
    with pytest.raises(BundleError, match="not a workbench bundle"):
        workbench.decompress(b"\x89PNG\r\n\x1a\n" + bytes(100))


def test_package_never_unpickles():
    import pathlib

    src = pathlib.Path(workbench.__file__).parent
    text = "".join(p.read_text() for p in src.rglob("*.py"))
    assert "import pickle" not in text and "torch.load(" not in text


@pytest.mark.parametrize("method", ["klt", "conv"])
@pytest.mark.parametrize("kind", ["rgba16", "grey-alpha8"])
def test_alpha_survives_every_codec_and_depth_exactly(method, kind, astronaut, camera16):
    if method == "conv":
        pytest.importorskip("torch")
    if kind == "rgba16":
        px = astronaut[:48, :64].astype(np.uint16) * 257
        alpha = np.linspace(0, 65535, 48 * 64).reshape(48, 64).astype(np.uint16)
    else:
        px = astronaut[:48, :64, 1]
        alpha = (np.arange(48 * 64) % 256).reshape(48, 64).astype(np.uint8)
    out = workbench.decompress(workbench.compress({"a": np.dstack([px, alpha])}, method=method, step=4))["a"]
    assert out.dtype == px.dtype and out.shape[:2] == (48, 64)
    assert np.array_equal(out[..., -1], alpha)


@pytest.mark.parametrize("version", [3, 4])
def test_older_bundles_with_one_stage_tokens_and_old_chunk_tags_still_decode(version, monkeypatch, astronaut):
    from workbench.codecs import klt

    img = SourceImage("s", astronaut[:64, :80])
    with monkeypatch.context() as m:  # what the writer of that version wrote
        m.setattr(klt, "TOKEN_SPLIT", None)
        m.setattr(bundle, "VERSION", version)
        if version == 3:
            m.setitem(bundle.TAGS, 3, (b"IMGD", b"ALFA"))
        made = pipeline.encode([img], Settings(step=4))
    old = made.data
    assert int.from_bytes(old[8:10], "little") == version
    assert old != pipeline.encode([img], Settings(step=4)).data  # the current format differs
    assert np.array_equal(workbench.decompress(old)["s"], made.images[0].reconstruction)


def test_a_header_version_that_disagrees_with_the_metadata_is_refused(small_bundle):
    bad = bytearray(small_bundle)
    bad[8] = 4
    with pytest.raises(BundleError, match="version"):
        bundle.parse(bytes(bad))
