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


def test_420_chroma_is_the_2x2_mean_of_the_t871_chroma_with_odd_edges_replicated(chelsea):
    # T.871 conversion per pixel (the reference path), then 2x2 averaging; the fast path
    # averages RGB first, which linearity makes the same.
    odd = chelsea[:299, :451]
    ref = np.pad(color.rgb_to_ycbcr(odd), ((0, 1), (0, 1), (0, 0)), mode="edge")
    mean = 0.25 * (ref[0::2, 0::2] + ref[1::2, 0::2] + ref[0::2, 1::2] + ref[1::2, 1::2])
    planes = color.to_planes(odd, "420", 1.0)
    assert np.abs(planes[0] - ref[:299, :451, 0]).max() < 1e-3
    assert np.abs(planes[1] - mean[..., 1]).max() < 1e-3
    assert np.abs(planes[2] - mean[..., 2]).max() < 1e-3


def test_420_reconstruction_keeps_a_constant_colour():
    img = np.zeros((7, 9, 3), np.uint8) + np.array([200, 30, 90], np.uint8)
    back = color.from_planes(color.to_planes(img, "420", 1.0), (7, 9), "420")
    assert np.abs(back - img).max() < 1e-3


def test_integer_pixels_of_444_planes_restore_an_8bit_photo_exactly(chelsea):
    # scikit-image's bundled "chelsea": T.871 there and back, rounded, is lossless.
    px = color.to_pixels(color.to_planes(chelsea, "444", 1.0), chelsea.shape[:2], "444", 8)
    assert px.dtype == np.uint8 and np.array_equal(px, chelsea)


def test_integer_pixels_of_444_planes_restore_a_16bit_image_exactly(chelsea):
    img = chelsea.astype(np.uint16) * 257 + np.arange(chelsea.shape[1], dtype=np.uint16)[None, :, None] % 251
    px = color.to_pixels(color.to_planes(img, "444", 255 / 65535), img.shape[:2], "444", 16)
    assert px.dtype == np.uint16 and np.array_equal(px, img)


def test_integer_pixels_are_rounded_half_to_even_and_clipped():
    y = np.array([[-3.0, 0.5, 1.5, 2.5, 254.6, 300.0]], np.float32)
    assert color.to_pixels([y], y.shape, "444", 8).tolist() == [[0, 0, 2, 2, 255, 255]]


def test_integer_pixels_of_420_planes_match_the_float_inverse_rounded(chelsea):
    odd = chelsea[:299, :451]
    planes = color.to_planes(odd, "420", 1.0)
    ref = np.clip(np.rint(color.from_planes(planes, odd.shape[:2], "420")), 0, 255)
    assert np.abs(color.to_pixels(planes, odd.shape[:2], "420", 8) - ref).max() == 0
