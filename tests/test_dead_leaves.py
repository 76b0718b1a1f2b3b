"""The dead-leaves training images (workbench.models.dead_leaves)."""

import numpy as np
import pytest
from scipy import stats

from workbench.models.dead_leaves import _radius, dead_leaves


def test_image_is_square_rgb_uint8_of_the_size_asked():
    img = dead_leaves(np.random.default_rng(0), 64)
    assert img.shape == (64, 64, 3) and img.dtype == np.uint8


def test_same_seed_gives_the_same_image():
    a = dead_leaves(np.random.default_rng(5), 64)
    b = dead_leaves(np.random.default_rng(5), 64)
    assert np.array_equal(a, b)


def test_radii_follow_the_inverse_cube_law():
    # Lee, Mumford & Huang (2001), sec. 3: radii with density proportional to r**-3 make the
    # model scale invariant. On [a, b] that density's CDF is (a**-2 - r**-2) / (a**-2 - b**-2).
    rng = np.random.default_rng(1)
    a, b = 2.0, 200.0
    r = np.array([_radius(rng, a, b) for _ in range(4000)])
    assert r.min() >= a and r.max() <= b
    cdf = lambda x: (a ** -2 - np.asarray(x) ** -2) / (a ** -2 - b ** -2)  # noqa: E731
    assert stats.kstest(r, cdf).pvalue > 0.01


def test_power_spectrum_falls_off_as_natural_images_do():
    # Natural images have a power spectrum close to 1/f**2 (Field 1987; van der Schaaf & van
    # Hateren 1996: exponents about 1.9 to 2.1 on average, individual images 1.5 to 3); the
    # scale-invariant dead-leaves model shares it (Lee, Mumford & Huang 2001).
    img = dead_leaves(np.random.default_rng(2), 256).astype(np.float64).mean(axis=2)
    p = np.abs(np.fft.fftshift(np.fft.fft2(img - img.mean()))) ** 2
    y, x = np.indices(p.shape) - 128
    f = np.hypot(y, x).astype(int)
    band = np.arange(4, 64)  # away from DC and from the blur and noise at the top
    power = np.array([p[f == k].mean() for k in band])
    slope = np.polyfit(np.log(band), np.log(power), 1)[0]
    assert -3.2 < slope < -1.5


def test_colours_come_from_the_palette():
    palette = np.array([[200, 30, 30], [30, 30, 200]], np.uint8)
    img = dead_leaves(np.random.default_rng(3), 64, palette).reshape(-1, 3).astype(int)
    # red and blue leaves only (shading, texture and noise move a pixel, not its hue): no pixel is green-dominant
    assert (img[:, 1] <= img[:, [0, 2]].max(axis=1) + 10).all()


@pytest.mark.parametrize("size", [0, 16])
def test_too_small_a_size_is_refused(size):
    with pytest.raises(ValueError, match="size"):
        dead_leaves(np.random.default_rng(0), size)


def test_a_palette_of_the_wrong_shape_is_refused():
    with pytest.raises(ValueError, match=r"palette.*\(4,\)"):
        dead_leaves(np.random.default_rng(0), 64, np.zeros(4))


def test_the_shipped_models_training_set_leaves_the_benchmark_photographs_out():
    # The benchmarks test on scikit-image's astronaut, coffee, chelsea and rocket (and the
    # stereo motorcycle pair): none of them, nor a crop of them, may be trained on.
    from skimage import data

    from workbench.models.make_default import HELD_OUT, training_images

    images = training_images(dead_leaves=2)
    names = [i.name for i in images]
    assert not HELD_OUT & set(names) and not any("motorcycle" in n for n in names)
    held = [getattr(data, n)() for n in ("astronaut", "coffee", "chelsea", "rocket")]
    assert not any(i.pixels.shape == h.shape and np.array_equal(i.pixels, h) for i in images for h in held)
    leaves = [i for i in images if i.name.startswith("leaves")]
    assert [i.pixels.shape for i in leaves] == [(384, 384, 3)] * 2


def test_a_negative_count_of_dead_leaves_images_is_refused_in_one_line(capsys):
    from workbench.models import make_default

    with pytest.raises(SystemExit) as exc:
        make_default.main(["--dead-leaves", "-3", "--minutes", "0"])
    assert exc.value.code == 2
    err = capsys.readouterr().err.strip().splitlines()[-1]
    assert "--dead-leaves must be 0 or more, got -3" in err
