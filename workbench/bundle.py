"""The ``.wbundle`` file: one or many compressed images plus shared side information.

A :mod:`workbench.container` with magic ``WKBUNDLE`` and chunks

* ``META`` deflated JSON: format version, tool version, settings, basis reference and one
  entry per image (name, size, bit depth, channels, alpha, SHA-256 of the source pixels,
  chunk indices);
* ``BASE`` optional shared basis (folder scope);
* ``IMGD`` one per image: the codec payload;
* ``ALFA`` optional, one per image with alpha: the alpha plane, lossless.

Reading happens in two stages: :func:`parse` validates the container and the metadata
(every field bounded) without decoding pixels; decoding an image is a separate step.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from . import container
from .errors import BundleError
from .settings import Settings

MAGIC = b"WKBUNDLE"
VERSION = 3  # 2: coefficient streams coded in lockstep (coefcode); 3: first pass as a row hierarchy
MAX_PIXELS = 1 << 27
_HEX64 = re.compile(r"^[0-9a-f]{64}$")


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
        chunks.append((b"IMGD", payload))
        if alpha is not None:
            entry["alpha_chunk"] = len(chunks)
            chunks.append((b"ALFA", alpha))
    chunks[0] = (b"META", container.pack_json(meta))
    return container.pack(MAGIC, VERSION, chunks)


def _field(d: dict, key: str, kind, what: str):
    if key not in d or not isinstance(d[key], kind) or isinstance(d[key], bool) and kind is not bool:
        raise BundleError(f"bundle metadata: {what} has a missing or invalid {key!r}")
    return d[key]


def parse(data: bytes) -> Contents:
    """Validate a bundle and return its contents without decoding any image."""
    chunks = container.unpack(data, MAGIC, (VERSION,), "workbench bundle")
    if not chunks or chunks[0][0] != b"META":
        raise BundleError("bundle has no metadata chunk")
    meta = container.unpack_json(chunks[0][1], "bundle")
    if not isinstance(meta, dict) or meta.get("format") != "wbundle":
        raise BundleError("bundle metadata is not a workbench bundle description")
    try:
        settings = Settings.from_dict(_field(meta, "settings", dict, "bundle"))
    except ValueError as exc:
        raise BundleError(f"bundle settings are invalid: {exc}") from None
    basis_ref = meta.get("basis_sha256")
    if basis_ref is not None and not (isinstance(basis_ref, str) and _HEX64.match(basis_ref)):
        raise BundleError("bundle metadata has an invalid basis reference")
    shared = next((body for tag, body in chunks if tag == b"BASE"), None)
    images = _field(meta, "images", list, "bundle")
    entries, names = [], set()
    for i, d in enumerate(images):
        if not isinstance(d, dict):
            raise BundleError(f"bundle metadata: image {i} is not an object")
        what = f"image {i}"
        name = _field(d, "name", str, what)
        w, h = _field(d, "width", int, what), _field(d, "height", int, what)
        bits, ch = _field(d, "bits", int, what), _field(d, "channels", int, what)
        checksum = _field(d, "sha256", str, what)
        if not (1 <= w <= 65536 and 1 <= h <= 65536 and w * h <= MAX_PIXELS):
            raise BundleError(f"bundle metadata: {what} has an invalid size {w}x{h}")
        if bits not in (8, 16) or ch not in (1, 3) or not _HEX64.match(checksum):
            raise BundleError(f"bundle metadata: {what} has invalid bits/channels/checksum")
        if not name or len(name) > 1024 or name in names or "\x00" in name:
            raise BundleError(f"bundle metadata: {what} has an invalid or repeated name")
        names.add(name)
        idx = _field(d, "chunk", int, what)
        if not (0 < idx < len(chunks)) or chunks[idx][0] != b"IMGD":
            raise BundleError(f"bundle metadata: {what} points at a missing image chunk")
        alpha = None
        if "alpha_chunk" in d:
            j = _field(d, "alpha_chunk", int, what)
            if not (0 < j < len(chunks)) or chunks[j][0] != b"ALFA":
                raise BundleError(f"bundle metadata: {what} points at a missing alpha chunk")
            alpha = chunks[j][1]
        entries.append(Entry(name, w, h, bits, ch, checksum, chunks[idx][1], alpha))
    return Contents(meta, settings, basis_ref, shared, entries, len(data))
