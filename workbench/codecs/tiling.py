"""Cut planes into B x B patches and put them back."""

from __future__ import annotations

import numpy as np

from ..errors import InputError


def grid_shape(shape: tuple[int, int], block: int) -> tuple[int, int]:
    """Number of patch rows and columns covering ``shape`` (edges padded)."""
    return -(-shape[0] // block), -(-shape[1] // block)


def to_patches(plane: np.ndarray, block: int) -> np.ndarray:
    """Tile a 2-D plane into patches.

    Edges are padded by replicating the last row/column, so every patch is full.

    Returns
    -------
    ndarray, shape (rows, cols, block * block)
        Patch pixels in row-major order.
    """
    plane = np.asarray(plane)
    if plane.ndim != 2 or plane.size == 0:
        raise InputError(f"to_patches needs a non-empty 2-D plane, got shape {plane.shape}")
    rows, cols = grid_shape(plane.shape, block)
    pad = ((0, rows * block - plane.shape[0]), (0, cols * block - plane.shape[1]))
    p = np.pad(plane, pad, mode="edge") if pad[0][1] or pad[1][1] else plane
    return p.reshape(rows, block, cols, block).transpose(0, 2, 1, 3).reshape(rows, cols, block * block)


def from_patches(patches: np.ndarray, shape: tuple[int, int], block: int) -> np.ndarray:
    """Inverse of :func:`to_patches`, cropped back to ``shape``."""
    rows, cols, n = patches.shape
    if n != block * block:
        raise InputError(f"patches of length {n} do not match block {block}")
    p = patches.reshape(rows, cols, block, block).transpose(0, 2, 1, 3).reshape(rows * block, cols * block)
    return p[: shape[0], : shape[1]]
