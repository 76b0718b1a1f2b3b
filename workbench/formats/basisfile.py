"""Serialising KLT bases: the shared-basis chunk and the ``.wbasis`` file.

A basis is stored as int16 vectors scaled by 2**14 and float32 eigenvalues; the encoder
rebuilds its synthesis matrix from those same integers, so encoder and decoder use the
same numbers bit for bit. A file's identity is the SHA-256 of its basis chunk.
"""

from __future__ import annotations

import hashlib
import struct
from pathlib import Path

import numpy as np

from . import container
from ..errors import BundleError, InputError
from ..codecs.klt_basis import Basis
from ..settings import BLOCK_SIZES

MAGIC = b"WKBBASIS"
VERSION = 1
SCALE = 1 << 14
_HEAD = struct.Struct("<BH")


def basis_to_bytes(basis: Basis, count: int | None = None) -> bytes:
    """Compact bytes of the first ``count`` vectors (all by default)."""
    n = basis.block**2
    count = n if count is None else int(count)
    if not 1 <= count <= n:
        raise InputError(f"basis vector count must be 1..{n}, got {count}")
    ints = np.clip(np.round(basis.vectors[:, :count].T * SCALE), -32768, 32767).astype("<i2")
    ev = basis.eigenvalues[:count].astype("<f4")
    return _HEAD.pack(basis.block, count) + ev.tobytes() + ints.tobytes()


def basis_from_bytes(data: bytes) -> Basis:
    """Inverse of :func:`basis_to_bytes` (vectors beyond the stored count are zero)."""
    if len(data) < _HEAD.size:
        raise BundleError("basis chunk is truncated")
    block, count = _HEAD.unpack_from(data, 0)
    if block not in BLOCK_SIZES:
        raise BundleError(f"basis block size {block} is not one of {BLOCK_SIZES}")
    n = block * block
    if not 1 <= count <= n:
        raise BundleError(f"basis claims {count} vectors for block {block}")
    need = _HEAD.size + 4 * count + 2 * count * n
    if len(data) != need:
        raise BundleError(f"basis chunk has {len(data)} bytes, expected {need}")
    with np.errstate(invalid="ignore"):  # a signalling NaN warns when widened; it is refused below
        ev = np.frombuffer(data, "<f4", count, _HEAD.size).astype(np.float64)
    ints = np.frombuffer(data, "<i2", count * n, _HEAD.size + 4 * count).reshape(count, n)
    if not np.all(np.isfinite(ev)):
        raise BundleError("basis eigenvalues are not finite")
    vectors = np.zeros((n, n))
    vectors[:, :count] = ints.T.astype(np.float64) / SCALE
    eigenvalues = np.zeros(n)
    eigenvalues[:count] = np.clip(ev, 0, None)
    return Basis(vectors, eigenvalues, block)


def basis_hash(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def basis_file_bytes(basis: Basis, *, sources: list[str] | None = None) -> bytes:
    """The bytes of a ``.wbasis`` file: metadata (kind, block, content hash, sources) and the basis."""
    body = basis_to_bytes(basis)
    meta = {"kind": "klt-basis", "block": basis.block, "sha256": basis_hash(body), "sources": sources or []}
    return container.pack(MAGIC, VERSION, [(b"META", container.pack_json(meta)), (b"BASE", body)])


def save_basis(path: str | Path, basis: Basis, *, sources: list[str] | None = None) -> str:
    """Write a ``.wbasis`` file atomically; returns its content hash."""
    from .imagefiles import write_atomic

    write_atomic(path, basis_file_bytes(basis, sources=sources))
    return basis_hash(basis_to_bytes(basis))


def parse_basis_file(data: bytes) -> tuple[Basis, str]:
    """Validate a ``.wbasis`` file's bytes; returns the basis and its content hash.

    The metadata must describe the stored basis: its kind, its block size and the SHA-256
    of the basis chunk (a file whose content was changed under its label is refused).
    """
    chunks = dict(container.unpack(data, MAGIC, (VERSION,), "workbench basis file"))
    if b"BASE" not in chunks or b"META" not in chunks:
        raise BundleError("basis file lacks its metadata or basis chunk")
    meta = container.unpack_json(chunks[b"META"], "basis file")
    body = chunks[b"BASE"]
    if not isinstance(meta, dict) or meta.get("kind") != "klt-basis":
        raise BundleError("basis file metadata is not a KLT basis description")
    basis = basis_from_bytes(body)
    digest = basis_hash(body)
    if meta.get("block") != basis.block or isinstance(meta.get("block"), bool):
        raise BundleError(f"basis file metadata says block {meta.get('block')!r}, its basis has {basis.block}")
    if meta.get("sha256") != digest:
        raise BundleError("basis file content does not match its recorded hash")
    sources = meta.get("sources", [])
    if not (isinstance(sources, list) and all(isinstance(x, str) for x in sources)):
        raise BundleError("basis file metadata has an invalid list of sources")
    return basis, digest


def load_basis(path: str | Path) -> tuple[Basis, str]:
    """Read a ``.wbasis`` file; returns the basis and its content hash."""
    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        raise InputError(f"{path}: cannot read basis file ({exc.strerror})") from None
    return parse_basis_file(data)
