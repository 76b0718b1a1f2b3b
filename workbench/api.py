"""The Python API: arrays in, bundle bytes out, and back."""

from __future__ import annotations

import numpy as np

from . import pipeline
from .errors import InputError
from .formats.imagefiles import SourceImage
from .codecs.klt_basis import Basis
from .settings import Settings


def _sources(images) -> list[SourceImage]:
    if isinstance(images, dict):
        items = list(images.items())
    elif isinstance(images, (list, tuple)):
        items = [(f"image_{i:03d}", a) for i, a in enumerate(images)]
    else:
        raise InputError(f"images must be a dict of name -> array or a list of arrays, got {type(images).__name__}")
    out = []
    for name, a in items:
        if isinstance(a, SourceImage):
            out.append(a)
        else:
            out.append(SourceImage(str(name), np.asarray(a)))
    return out


def compress(images, method: str = "klt", *, basis: Basis | None = None, basis_ref: str | None = None,
             **settings) -> bytes:
    """Compress images into ``.wbundle`` bytes.

    Parameters
    ----------
    images : dict of str -> ndarray, or list of ndarray
        (H, W) grey, (H, W, 3) RGB or (H, W, 4) RGBA, uint8 or uint16.
    method : str
        A registered method (:func:`workbench.codecs.names`).
    basis : Basis, optional
        External folder basis (see :func:`workbench.formats.basisfile.load_basis`); the bundle
        refers to it by ``basis_ref`` instead of carrying it.
    **settings
        Fields of :class:`workbench.Settings` (``block``, ``count``, ``step``, ``chroma``,
        ``basis_scope``, ``target``...).

    Examples
    --------
    >>> import numpy as np, workbench
    >>> img = (np.arange(64 * 64) % 251).astype(np.uint8).reshape(64, 64)
    >>> out = workbench.decompress(workbench.compress([img], step=2.0))
    >>> out["image_000"].shape
    (64, 64)
    """
    s = Settings(method=method, **settings)
    return pipeline.encode(_sources(images), s, shared=basis, shared_ref=basis_ref, measure=False).data


def decompress(data: bytes, basis: Basis | None = None, basis_ref: str | None = None) -> dict[str, np.ndarray]:
    """Decode ``.wbundle`` bytes into a dict of name -> pixels (alpha as a last channel)."""
    _, decoded = pipeline.decode(bytes(data), shared=basis, shared_ref=basis_ref)
    return {d.name: d.pixels for d in decoded}
