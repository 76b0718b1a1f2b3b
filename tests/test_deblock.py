"""The block KLT's edge filter: what it smooths, what it keeps, and that it pays."""

import numpy as np
import pytest
from skimage.metrics import peak_signal_noise_ratio

from workbench import pipeline
from workbench.codecs import klt
from workbench.formats.imagefiles import SourceImage
from workbench.settings import Settings


def two_blocks(left: float, right: float) -> np.ndarray:
    plane = np.full((16, 16), left, np.float32)
    plane[:, 8:] = right
    return plane


def test_a_quantiser_sized_jump_across_a_block_edge_is_smoothed():
    # Hand-built: flat 8x8 blocks 100 | 104 at step 8 (a jump of half a step). d = (4 * 4 +
    # (100 - 104)) / 8 = 1.5, within the limit of a quarter step (2): p0 -> 101.5, q0 -> 102.5.
    out = klt.deblock(two_blocks(100.0, 104.0), 8, 8.0)
    assert np.allclose(out[:, 7], 101.5) and np.allclose(out[:, 8], 102.5)
    assert np.allclose(out[:, :7], 100.0) and np.allclose(out[:, 9:], 104.0)


def test_the_change_is_limited_to_a_quarter_step():
    # 100 | 107.9 at step 8: d = (4 * 7.9 - 7.9) / 8 = 2.96, clipped to 2.
    out = klt.deblock(two_blocks(100.0, 107.9), 8, 8.0)
    assert np.allclose(out[:, 7], 102.0) and np.allclose(out[:, 8], 105.9)


def test_an_edge_of_the_image_itself_is_kept():
    # A jump of two steps is the picture's, not the quantiser's.
    plane = two_blocks(100.0, 116.0)
    assert np.array_equal(klt.deblock(plane.copy(), 8, 8.0), plane)


def test_edges_inside_a_block_are_not_touched():
    plane = np.full((16, 16), 100.0, np.float32)
    plane[:, 4:] = 104.0  # inside the first 8x8 block column
    assert np.array_equal(klt.deblock(plane.copy(), 8, 8.0), plane)


def psnr_with_and_without_the_filter(img, step):
    planes = pipeline.image_planes(SourceImage("x", img), "420")
    a = klt.CODEC.analyse(planes, Settings(step=step), None)
    on = klt.CODEC.quantise(a, step=step, count=None)
    off = klt.CODEC.quantise(a, step=step, count=None, deblock=False)

    def psnr(c):
        return peak_signal_noise_ratio(img, np.clip(np.round(c.planes[0]), 0, 255).astype(np.uint8))

    return psnr(on), psnr(off), on.filtered


@pytest.mark.parametrize("name", ["brick", "text"])
def test_the_filter_raises_psnr_where_blocks_show(name):
    # PSNR by scikit-image's peak_signal_noise_ratio on its bundled 'brick' and 'text' (not
    # among the images the thresholds were chosen on), the same levels with and without it.
    from skimage import data

    on, off, filtered = psnr_with_and_without_the_filter(getattr(data, name)(), 32.0)
    assert filtered == (True,) and on > off + 0.1


def test_the_encoder_leaves_the_filter_off_where_it_would_cost(camera):
    # scikit-image's 'moon' at step 8: smoothing its block edges would lose 0.4 dB (measured),
    # so the encoder does not ask for it and the PSNR is that of the plain reconstruction.
    from skimage import data

    on, off, filtered = psnr_with_and_without_the_filter(data.moon(), 8.0)
    assert filtered == (False,) and on == off


def test_a_payload_without_the_edge_flag_decodes_unfiltered(chelsea):
    # Bundles written before the filter carry no flag: they decode exactly as they did.
    s = Settings(step=20.0)
    planes = pipeline.image_planes(SourceImage("chelsea", chelsea), s.chroma)
    a = klt.CODEC.analyse(planes, s, None)
    off = klt.CODEC.quantise(a, step=20.0, count=None, deblock=False)
    data = klt.CODEC.serialise(off)
    assert (data[6] & ~klt.INT_TOKENS) >> 2 == 0  # the flags byte follows step f32 and kept u16
    decoded = klt.CODEC.decode(data, [p.shape for p in planes], s)
    for got, want in zip(decoded, off.planes):
        assert np.array_equal(got, want)
    on = klt.CODEC.quantise(a, step=20.0, count=None)
    assert any(on.filtered) and (klt.CODEC.serialise(on)[6] & ~klt.INT_TOKENS) >> 2 == sum(f << i for i, f in enumerate(on.filtered))
    decoded_on = klt.CODEC.decode(klt.CODEC.serialise(on), [p.shape for p in planes], s)
    assert all(np.array_equal(g, w) for g, w in zip(decoded_on, on.planes))
    assert not np.array_equal(decoded_on[0], decoded[0])
