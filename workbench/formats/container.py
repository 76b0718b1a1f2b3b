"""The chunked container shared by bundles, basis files and model files.

Layout (all integers little-endian)::

    magic      8 bytes     identifies the file kind
    version    u16
    reserved   u16         zero
    count      u32         number of chunks (bounded by MAX_CHUNKS)
    table_crc  u32         CRC-32 of the chunk table
    table      count x 24  tag (4 ASCII bytes), crc32 u32, offset u64, length u64
    payload    chunk bodies, each covered by its own CRC-32

Reading checks the magic, version, every bound and every CRC before any chunk is
interpreted, so a truncated, bit-flipped or hand-made file fails here with a
:class:`~workbench.errors.BundleError` and nothing larger than the file is allocated.
"""

from __future__ import annotations

import json
import struct
import zlib

from ..errors import BundleError

HEADER = struct.Struct("<8sHHII")
ENTRY = struct.Struct("<4sIQQ")
MAX_CHUNKS = 1 << 16
MAX_JSON = 4 << 20  # about 10,000 images' entries; a small cap keeps a deflate bomb's objects small


def pack(magic: bytes, version: int, chunks: list[tuple[bytes, bytes]]) -> bytes:
    """Assemble a container from ``(tag, body)`` pairs."""
    if len(magic) != 8:
        raise ValueError("magic must be 8 bytes")
    if len(chunks) > MAX_CHUNKS:
        raise ValueError(f"too many chunks: {len(chunks)} > {MAX_CHUNKS}")
    offset = HEADER.size + ENTRY.size * len(chunks)
    table = bytearray()
    for tag, body in chunks:
        if len(tag) != 4:
            raise ValueError(f"chunk tag must be 4 bytes, got {tag!r}")
        table += ENTRY.pack(tag, zlib.crc32(body), offset, len(body))
        offset += len(body)
    head = HEADER.pack(magic, version, 0, len(chunks), zlib.crc32(table))
    return b"".join([head, bytes(table)] + [body for _, body in chunks])


def unpack(data: bytes, magic: bytes, versions: tuple[int, ...], what: str) -> list[tuple[bytes, bytes]]:
    """Validate a container and return its ``(tag, body)`` pairs.

    Raises
    ------
    BundleError
        If anything about the file is wrong; the message says what.
    """
    data = memoryview(data)
    if len(data) < HEADER.size:
        raise BundleError(f"not a {what}: file is only {len(data)} bytes")
    got_magic, version, reserved, count, table_crc = HEADER.unpack_from(data, 0)
    if got_magic != magic:
        raise BundleError(f"not a {what} (unrecognised file signature)")
    if version not in versions:
        raise BundleError(f"{what} version {version} is not supported (this build reads {list(versions)})")
    if reserved != 0:
        raise BundleError(f"{what} header is corrupted (reserved field is {reserved})")
    if count > MAX_CHUNKS:
        raise BundleError(f"{what} claims {count} chunks (limit {MAX_CHUNKS})")
    table_end = HEADER.size + ENTRY.size * count
    if table_end > len(data):
        raise BundleError(f"{what} is truncated (chunk table cut off)")
    table = data[HEADER.size : table_end]
    if zlib.crc32(table) != table_crc:
        raise BundleError(f"{what} chunk table is corrupted (CRC mismatch)")
    chunks = []
    for i in range(count):
        tag, crc, offset, length = ENTRY.unpack_from(table, i * ENTRY.size)
        if offset < table_end or offset + length > len(data):
            raise BundleError(f"{what} is truncated or malformed (chunk {i} lies outside the file)")
        body = bytes(data[offset : offset + length])
        if zlib.crc32(body) != crc:
            raise BundleError(f"{what} chunk {i} ({tag.decode('ascii', 'replace')!r}) is corrupted (CRC mismatch)")
        chunks.append((tag, body))
    return chunks


def pack_json(obj) -> bytes:
    """Compact, deflated JSON for metadata chunks."""
    return zlib.compress(json.dumps(obj, separators=(",", ":"), sort_keys=True).encode(), 9)


def unpack_json(body: bytes, what: str):
    try:
        d = zlib.decompressobj()
        raw = d.decompress(body, MAX_JSON)
        if d.unconsumed_tail:
            raise BundleError(f"{what} metadata is larger than {MAX_JSON} bytes")
        return json.loads(raw.decode("utf-8"))
    except RecursionError:
        raise BundleError(f"{what} metadata is nested too deeply") from None
    except (zlib.error, ValueError) as exc:  # ValueError covers bad UTF-8, bad JSON and 5,000-digit numbers
        raise BundleError(f"{what} metadata is unreadable ({str(exc)[:80]})") from None
