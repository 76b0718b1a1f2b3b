"""The ``.wbundle`` file: one or many compressed images plus shared side information.

A :mod:`workbench.formats.container` with magic ``WKBUNDLE`` and chunks

* ``META`` deflated JSON: format version, tool version, settings, basis reference and one
  entry per image (name, size, bit depth, channels, alpha, SHA-256 of the source pixels,
  chunk indices);
* ``BASE`` optional shared basis (folder scope);
* ``CODE`` one per image: the codec payload;
* ``OPAQ`` optional, one per image with alpha: the alpha (opacity) plane, lossless.

(Version 3 files, which named these chunks differently, are still read.)

Reading happens in two stages: :func:`parse` validates the container and the metadata
(every field bounded) without decoding pixels; decoding an image is a separate step.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from . import container
from ..errors import BundleError, InputError
from .names import name_problem
from ..settings import Settings

MAGIC = b"WKBUNDLE"
VERSION = 7  # 2: coefficient streams coded in lockstep (coefcode); 3: first pass as a row hierarchy; 4: chunk tags;
# 5: tokens in two stages (each payload says which way it was coded, so 3 and 4 still decode);
# 6: the conv payload's bfloat16 bit (conv.BF16); 7: adaptive tokens through workbench's own
# coder over integer counts (codecs/ans.py; the payloads' INT_TOKENS bits say so)
# (image payload, alpha) chunk tags by version
TAGS = {3: (b"IMGD", b"ALFA"), 4: (b"CODE", b"OPAQ"), 5: (b"CODE", b"OPAQ"), 6: (b"CODE", b"OPAQ"),
        7: (b"CODE", b"OPAQ")}
MAX_SIDE = 65536
MAX_IMAGE_PIXELS = 1 << 27  # one image
MAX_PIXELS = 1 << 28  # default budget for all images of one bundle together (raise it per call)
MAX_IMAGES = 4096
_HEX64 = re.compile(r"^[0-9a-f]{64}$")
_TOP_KEYS = {"format", "version", "tool", "settings", "images", "basis_sha256"}
_ENTRY_KEYS = {"name", "width", "height", "bits", "channels", "sha256", "chunk", "alpha_chunk"}


@dataclass
class Entry:
    """One image of a bundle, validated but not decoded."""

    name: str
    width: int
    height: int
    bits: int
    channels: int
    checksum: str
    payload: bytes
    alpha: bytes | None

    @property
    def pixels(self) -> int:
        return self.width * self.height


@dataclass
class Contents:
    meta: dict
    settings: Settings
    basis_ref: str | None
    shared: bytes | None
    entries: list[Entry]
    size: int


def assemble(meta: dict, shared: bytes | None, payloads: list[bytes], alphas: list[bytes | None]) -> bytes:
    """Lay out a bundle; ``meta['images'][i]`` gets its chunk indices filled in."""
    chunks = [(b"META", b"")]
    if shared is not None:
        chunks.append((b"BASE", shared))
    for entry, payload, alpha in zip(meta["images"], payloads, alphas):
        entry["chunk"] = len(chunks)
        chunks.append((TAGS[VERSION][0], payload))
        if alpha is not None:
            entry["alpha_chunk"] = len(chunks)
            chunks.append((TAGS[VERSION][1], alpha))
    chunks[0] = (b"META", container.pack_json(meta))
    return container.pack(MAGIC, VERSION, chunks)


def check_images(specs, *, max_pixels: int = MAX_PIXELS, error=BundleError) -> None:
    """Check what a bundle may hold: the one rule shared by the encoder and the decoder.

    Parameters
    ----------
    specs : list of (name, width, height, bits, channels)
    max_pixels : int
        Budget for the declared pixels of all images together, checked before any work
        (the decoder's answer to a small file that declares huge images).
    error : type
        :class:`BundleError` when reading a file, :class:`InputError` when encoding.
    """
    if len(specs) > MAX_IMAGES:
        raise error(f"a bundle holds at most {MAX_IMAGES} images, got {len(specs)}")
    names, total = set(), 0
    for i, (name, w, h, bits, ch) in enumerate(specs):
        problem = name_problem(name)
        if problem:
            raise error(f"image {i} has an invalid name: {problem}")
        label = name
        if name in names:
            raise error(f"{label}: the name is used twice in one bundle")
        names.add(name)
        if not (1 <= w <= MAX_SIDE and 1 <= h <= MAX_SIDE and w * h <= MAX_IMAGE_PIXELS):
            raise error(f"{label}: size {w}x{h} is outside what a bundle holds "
                        f"(sides 1..{MAX_SIDE}, at most {MAX_IMAGE_PIXELS:,} pixels)")
        if bits not in (8, 16) or ch not in (1, 3):
            raise error(f"{label}: {bits}-bit {ch}-channel images are not supported")
        total += w * h
        if total > max_pixels:
            raise error(f"the images declare more than {max_pixels:,} pixels in all "
                        "(raise the pixel budget to open this bundle)")


def _field(d: dict, key: str, kind, what: str):
    value = d.get(key)
    if value is None or not isinstance(value, kind) or isinstance(value, bool) and kind is not bool:
        raise BundleError(f"bundle metadata: {what} has a missing or invalid {key!r}")
    return value


def parse(data: bytes, *, max_pixels: int = MAX_PIXELS) -> Contents:
    """Validate a bundle and return its contents without decoding any image.

    Every metadata field is checked for type, range and known keys before anything is built
    from it, and the declared pixels are held to ``max_pixels`` (see :func:`check_images`).
    """
    chunks = container.unpack(data, MAGIC, tuple(TAGS), "workbench bundle")
    version = int.from_bytes(bytes(data[8:10]), "little")
    image_tag, alpha_tag = TAGS[version]
    if not chunks or chunks[0][0] != b"META":
        raise BundleError("bundle has no metadata chunk")
    meta = container.unpack_json(chunks[0][1], "bundle")
    if not isinstance(meta, dict) or meta.get("format") != "wbundle":
        raise BundleError("bundle metadata is not a workbench bundle description")
    unknown = set(meta) - _TOP_KEYS
    if unknown:
        raise BundleError(f"bundle metadata has unknown fields {sorted(unknown)[:5]}")
    if meta.get("version") != version:  # the metadata's copy is under a CRC, the header's is not
        raise BundleError(f"bundle metadata says version {meta.get('version')!r}, its header {version}")
    try:
        settings = Settings.from_dict(_field(meta, "settings", dict, "bundle"))
    except InputError as exc:
        raise BundleError(f"bundle settings are invalid: {exc}") from None
    if not isinstance(meta.get("tool", ""), str):
        raise BundleError("bundle metadata has an invalid 'tool'")
    basis_ref = meta.get("basis_sha256")
    if basis_ref is not None and not (isinstance(basis_ref, str) and _HEX64.match(basis_ref)):
        raise BundleError("bundle metadata has an invalid basis reference")
    shared = next((body for tag, body in chunks if tag == b"BASE"), None)
    images = _field(meta, "images", list, "bundle")
    if len(images) > MAX_IMAGES:
        raise BundleError(f"a bundle holds at most {MAX_IMAGES} images, this one declares {len(images)}")
    specs = []
    for i, d in enumerate(images):
        what = f"image {i}"
        if not isinstance(d, dict):
            raise BundleError(f"bundle metadata: {what} is not an object")
        if set(d) - _ENTRY_KEYS:
            raise BundleError(f"bundle metadata: {what} has unknown fields {sorted(set(d) - _ENTRY_KEYS)[:5]}")
        specs.append((_field(d, "name", str, what), _field(d, "width", int, what), _field(d, "height", int, what),
                      _field(d, "bits", int, what), _field(d, "channels", int, what)))
        if not _HEX64.match(_field(d, "sha256", str, what)):
            raise BundleError(f"bundle metadata: {what} has an invalid checksum")
    check_images(specs, max_pixels=max_pixels)
    entries = []
    for i, (d, (name, w, h, bits, ch)) in enumerate(zip(images, specs)):
        what = f"image {i}"
        idx = _field(d, "chunk", int, what)
        if not (0 < idx < len(chunks)) or chunks[idx][0] != image_tag:
            raise BundleError(f"bundle metadata: {what} points at a missing image chunk")
        alpha = None
        if "alpha_chunk" in d:
            j = _field(d, "alpha_chunk", int, what)
            if not (0 < j < len(chunks)) or chunks[j][0] != alpha_tag:
                raise BundleError(f"bundle metadata: {what} points at a missing alpha chunk")
            alpha = chunks[j][1]
        entries.append(Entry(name, w, h, bits, ch, d["sha256"], chunks[idx][1], alpha))
    return Contents(meta, settings, basis_ref, shared, entries, len(data))
