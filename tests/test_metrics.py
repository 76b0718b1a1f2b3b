"""PSNR and SSIM against scikit-image's reference implementations."""

import numpy as np
import pytest
from skimage.metrics import peak_signal_noise_ratio, structural_similarity

from workbench.quality import metrics
from workbench.errors import InputError


def _noisy(img, amount, seed=0):
    rng = np.random.default_rng(seed)
    peak = np.iinfo(img.dtype).max
    return np.clip(img.astype(np.int64) + rng.integers(-amount, amount + 1, img.shape), 0, peak).astype(img.dtype)


def _sk_ssim(a, b, r):
    # Wang et al. (2004) settings as the issue specifies them for scikit-image.
    return structural_similarity(a, b, gaussian_weights=True, sigma=1.5, use_sample_covariance=False,
                                 data_range=r, channel_axis=2 if a.ndim == 3 else None)


@pytest.mark.parametrize("name", ["camera", "astronaut", "chelsea", "camera16"])
def test_psnr_matches_scikit_image(name, request):
    img = request.getfixturevalue(name)
    test = _noisy(img, 3000 if img.dtype == np.uint16 else 12)
    r = 65535 if img.dtype == np.uint16 else 255
    assert metrics.psnr(img, test) == pytest.approx(peak_signal_noise_ratio(img, test, data_range=r), abs=1e-9)


@pytest.mark.parametrize("name", ["camera", "astronaut", "chelsea", "camera16"])
def test_ssim_matches_scikit_image_to_1e4(name, request):
    img = request.getfixturevalue(name)
    test = _noisy(img, 3000 if img.dtype == np.uint16 else 25)
    r = 65535 if img.dtype == np.uint16 else 255
    assert abs(metrics.ssim(img, test) - _sk_ssim(img, test, r)) < 1e-4


def test_a_reused_ssim_reference_matches_scikit_image_on_every_call(astronaut):
    # scikit-image's structural_similarity as the reference, for several test images
    # measured against one cached reference (the slider's use).
    ref = metrics.SSIMReference(astronaut)
    for amount in (5, 25, 60):
        test = _noisy(astronaut, amount)
        assert abs(ref.ssim(test) - _sk_ssim(astronaut, test, 255)) < 1e-4


def test_mse_of_16_bit_images_is_exact(astronaut):
    a = astronaut.astype(np.uint16) * 257
    b = _noisy(astronaut, 25).astype(np.uint16) * 257
    d = a.astype(np.float64) - b
    assert metrics.mse(a, b) == pytest.approx(np.mean(d * d), rel=1e-12)


def test_ssim_of_a_blurred_image_matches_scikit_image(camera):
    blurred = (camera[:-1:2, :-1:2].repeat(2, 0).repeat(2, 1)).astype(np.uint8)
    assert abs(metrics.ssim(camera, blurred) - _sk_ssim(camera, blurred, 255)) < 1e-4


def test_identical_images_have_infinite_psnr_and_unit_ssim(camera):
    assert metrics.psnr(camera, camera) == float("inf")
    assert metrics.ssim(camera, camera) == pytest.approx(1.0, abs=1e-6)


def test_mismatched_shapes_are_refused(camera):
    with pytest.raises(InputError, match="differ in shape"):
        metrics.psnr(camera, camera[:10])


def test_tile_map_finds_the_damaged_tile(camera):
    damaged = camera.copy()
    damaged[70:90, 200:220] = 0  # inside tile row 2, column 6 for 32-pixel tiles
    tiles = metrics.tile_psnr(camera, damaged, tile=32)
    x, y, p = tiles.worst(1)[0]
    assert (x, y) == (192, 64) and np.isfinite(p)
    assert np.isinf(tiles.psnr[0, 0])


def test_tile_map_pools_the_same_error_as_global_psnr(astronaut):
    test = _noisy(astronaut, 10)
    tiles = metrics.tile_psnr(astronaut, test, tile=64)
    mse_tiles = np.mean(255.0**2 / 10 ** (tiles.psnr / 10))
    assert 10 * np.log10(255.0**2 / mse_tiles) == pytest.approx(metrics.psnr(astronaut, test), abs=1e-9)
