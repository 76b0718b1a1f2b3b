"""The ``.wmodel`` file: a learned codec's weights and entropy tables, no code inside.

A :mod:`workbench.formats.container` with magic ``WKBMODEL`` and chunks ``META`` (deflated JSON:
architecture, per-channel scale indices, training record), ``WGTS`` (the weights as a
safetensors archive, which holds only tensors and is loaded without executing anything)
and ``TABS`` (int64 token counts, one row per entropy-table index). The file's identity,
which bundles refer to, is the SHA-256 of ``WGTS`` + ``TABS`` + the scale indices.

The tables are integers computed once when the model is saved: a decoder anywhere builds
bit for bit the distributions the encoder used.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..codecs import symbols
from . import container
from ..errors import BundleError, InputError

MAGIC = b"WKBMODEL"
VERSION = 1
TABLE_MIN, TABLE_MAX = -96, 128  # table i is a Laplace of scale 2**(i/8) quantiser units
MAX_CHANNELS = 1024
MAX_HIDDEN = 1024


def scale_tables() -> np.ndarray:
    return np.stack([symbols.laplace_token_counts(2.0 ** (i / 8)) for i in range(TABLE_MIN, TABLE_MAX + 1)])


@dataclass
class ModelData:
    arch: dict
    weights: dict  # name -> float32 ndarray
    scale_index: np.ndarray  # int64 per latent channel: round(8 * log2(scale))
    tables: np.ndarray
    info: dict
    sha256: str
    raw: bytes

    def counts(self, channel: int, step_index: int) -> np.ndarray:
        """Token counts for ``channel`` at quantiser step 2**(step_index/8)."""
        i = int(np.clip(self.scale_index[channel] - step_index, TABLE_MIN, TABLE_MAX)) - TABLE_MIN
        return self.tables[i]


def _digest(wgts: bytes, tabs: bytes, scale_index: np.ndarray) -> str:
    h = hashlib.sha256(wgts)
    h.update(tabs)
    h.update(np.asarray(scale_index, "<i8").tobytes())
    return h.hexdigest()


def model_bytes(arch: dict, weights: dict, log_scale: np.ndarray, info: dict) -> bytes:
    """Serialise a model; ``log_scale`` is each channel's log2 Laplace scale."""
    from safetensors.numpy import save

    wgts = save({k: np.ascontiguousarray(v, dtype=np.float32) for k, v in weights.items()})
    scale_index = np.round(8 * np.asarray(log_scale, dtype=np.float64)).astype(np.int64)
    tabs = scale_tables().astype("<i8").tobytes()
    meta = {"kind": "conv-model", "arch": arch, "scale_index": scale_index.tolist(), "info": info,
            "tables": [TABLE_MIN, TABLE_MAX], "sha256": _digest(wgts, tabs, scale_index)}
    return container.pack(MAGIC, VERSION, [(b"META", container.pack_json(meta)), (b"WGTS", wgts), (b"TABS", tabs)])


def parse_model(data: bytes) -> ModelData:
    """Validate and read a model file's bytes (no code is executed)."""
    from safetensors import SafetensorError
    from safetensors.numpy import load

    chunks = dict(container.unpack(data, MAGIC, (VERSION,), "workbench model file"))
    for tag in (b"META", b"WGTS", b"TABS"):
        if tag not in chunks:
            raise BundleError(f"model file lacks its {tag.decode()} chunk")
    meta = container.unpack_json(chunks[b"META"], "model")
    if not isinstance(meta, dict) or meta.get("kind") != "conv-model":
        raise BundleError("model file metadata is not a conv model description")
    arch = meta.get("arch")
    if not (isinstance(arch, dict) and set(arch) in ({"hidden", "latent"}, {"hidden", "latent", "side", "side_hidden"})
            and all(type(arch[k]) is int for k in arch)  # not bool, not float
            and 1 <= arch["hidden"] <= MAX_HIDDEN and 1 <= arch["latent"] <= MAX_CHANNELS
            and 0 <= arch.get("side", 0) <= MAX_CHANNELS and 0 <= arch.get("side_hidden", 0) <= MAX_HIDDEN):
        raise BundleError("model file has an invalid architecture ('hidden' and 'latent', optionally 'side' and "
                          "'side_hidden', whole numbers)")
    si = meta.get("scale_index")
    if not (isinstance(si, list) and len(si) == arch["latent"] and all(isinstance(v, int) and abs(v) < 10_000 for v in si)):
        raise BundleError("model file has invalid entropy-model scales")
    n_tab = TABLE_MAX - TABLE_MIN + 1
    tabs = chunks[b"TABS"]
    if len(tabs) != n_tab * symbols.ALPHABET * 8 or meta.get("tables") != [TABLE_MIN, TABLE_MAX]:
        raise BundleError("model file has entropy tables of the wrong size")
    tables = np.frombuffer(tabs, "<i8").reshape(n_tab, symbols.ALPHABET).astype(np.int64)
    if tables.min() < 1 or tables.max() > 1 << 20:
        raise BundleError("model file has invalid entropy tables")
    try:
        weights = load(chunks[b"WGTS"])
    except (SafetensorError, ValueError, Exception) as exc:  # safetensors raises several kinds
        raise BundleError(f"model weights are unreadable ({exc})") from None
    for k, v in weights.items():
        if v.dtype != np.float32 or not np.all(np.isfinite(v)):
            raise BundleError(f"model weight {k!r} is not finite float32")
    scale_index = np.asarray(si, dtype=np.int64)
    digest = _digest(chunks[b"WGTS"], tabs, scale_index)
    if meta.get("sha256") not in (None, digest):
        raise BundleError("model file content does not match its recorded hash")
    return ModelData(arch, weights, scale_index, tables, meta.get("info", {}), digest, bytes(data))


def read_model(path) -> ModelData:
    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        raise InputError(f"{path}: cannot read model file ({exc.strerror})") from None
    return parse_model(data)
