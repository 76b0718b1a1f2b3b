import numpy as np
import pytest

from workbench.codecs import tiling
from workbench.errors import InputError


@pytest.mark.parametrize("block", [4, 8, 16, 32])
@pytest.mark.parametrize("shape", [(1, 1), (5, 37), (64, 64), (33, 70)])
def test_patches_round_trip_crops_back_exactly(block, shape):
    plane = np.arange(shape[0] * shape[1], dtype=float).reshape(shape)
    patches = tiling.to_patches(plane, block)
    assert patches.shape == tiling.grid_shape(shape, block) + (block * block,)
    assert np.array_equal(tiling.from_patches(patches, shape, block), plane)


def test_edges_are_replicated():
    plane = np.arange(6, dtype=float).reshape(2, 3)
    p = tiling.to_patches(plane, 4)[0, 0].reshape(4, 4)
    assert np.array_equal(p[:, 3], [2, 5, 5, 5]) and np.array_equal(p[3], [3, 4, 5, 5])


def test_empty_plane_is_refused():
    with pytest.raises(InputError, match="non-empty"):
        tiling.to_patches(np.zeros((0, 4)), 4)
