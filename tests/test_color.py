"""Colour conversion per ITU-T T.871 (JFIF), section 7."""

import numpy as np
from PIL import Image

from workbench import color


def test_forward_matrix_matches_t871_rounded_constants():
    # T.871 (05/2011) section 7: Y = 0.299 R + 0.587 G + 0.114 B,
    # Cb = -0.1687 R - 0.3313 G + 0.5 B + 128, Cr = 0.5 R - 0.4187 G - 0.0813 B + 128.
    t871 = np.array([[0.299, 0.587, 0.114], [-0.1687, -0.3313, 0.5], [0.5, -0.4187, -0.0813]])
    assert np.allclose(color.RGB_TO_YCBCR, t871, atol=5e-5)


def test_inverse_matrix_matches_t871_rounded_constants():
    # T.871 section 7: R = Y + 1.402 (Cr-128); G = Y - 0.34414 (Cb-128) - 0.71414 (Cr-128); B = Y + 1.772 (Cb-128).
    t871 = np.array([[1, 0, 1.402], [1, -0.34414, -0.71414], [1, 1.772, 0]])
    assert np.allclose(color.YCBCR_TO_RGB, t871, atol=5e-5)


def test_grey_maps_to_neutral_chroma():
    grey = np.full((2, 2, 3), 77.0)
    ycc = color.rgb_to_ycbcr(grey)
    assert np.allclose(ycc[..., 0], 77) and np.allclose(ycc[..., 1:], 128)


def test_round_trip_is_exact_to_float_precision(astronaut):
    back = color.ycbcr_to_rgb(color.rgb_to_ycbcr(astronaut))
    assert np.abs(back - astronaut).max() < 1e-9


def test_agrees_with_pillows_jfif_conversion(astronaut):
    # Pillow's RGB->YCbCr is the JFIF conversion in fixed point (truncating): allow one level.
    ref = np.asarray(Image.fromarray(astronaut).convert("YCbCr"), dtype=float)
    ours = color.rgb_to_ycbcr(astronaut)
    assert np.abs(ours - ref).max() < 1.01


def test_420_planes_have_half_size_rounded_up(chelsea):
    planes = color.to_planes(chelsea, "420", 1.0)
    assert planes[0].shape == (300, 451)
    assert planes[1].shape == planes[2].shape == (150, 226)


def test_444_round_trip_is_lossless_before_quantisation(chelsea):
    # The decoder side works in float32: far below the half level that rounding removes.
    planes = color.to_planes(chelsea, "444", 1.0)
    back = color.from_planes(planes, chelsea.shape[:2], "444")
    assert np.abs(back - chelsea).max() < 1e-3


def test_chroma_resampling_keeps_a_constant_plane():
    plane = np.full((7, 9), 42.0)
    assert np.allclose(color.upsample2(color.downsample2(plane), (7, 9)), 42.0)
