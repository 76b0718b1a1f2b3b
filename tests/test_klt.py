"""The KLT against its textbook properties."""

import numpy as np
import pytest

from workbench.codecs import klt_basis, tiling


def test_markov_klt_approaches_the_dct_ii():
    # Ahmed, Natarajan & Rao (1974), "Discrete Cosine Transform", IEEE Trans. Computers C-23:
    # for a first-order Markov process with rho near 1 the KLT basis tends to the DCT-II.
    # A 16-sample sequence (n = 16 = 4 x 4 fits the basis fitter); every KLT vector is within
    # about 3.5 degrees of its DCT-II counterpart (|cos| >= 0.998 here).
    basis = klt_basis.basis_from_covariance(klt_basis.markov_covariance(16, 0.95), 4)
    cosines = np.abs(np.sum(basis.vectors * klt_basis.dct2_matrix(16), axis=0))
    assert cosines.min() > 0.997


def test_separable_markov_klt_compacts_energy_like_the_2d_dct():
    # Same source, 8x8 separable case: the KLT is optimal for energy compaction (never below
    # the DCT at any K) and the 2-D DCT-II is within half a per cent of it at every K.
    c1 = klt_basis.markov_covariance(8, 0.95)
    cov = np.kron(c1, c1)
    basis = klt_basis.basis_from_covariance(cov, 8)
    d2 = np.kron(klt_basis.dct2_matrix(8), klt_basis.dct2_matrix(8))
    dct_var = np.sort(np.diag(d2.T @ cov @ d2))[::-1]
    klt_energy = basis.energy_kept()
    dct_energy = np.cumsum(dct_var) / dct_var.sum()
    assert np.all(klt_energy >= dct_energy - 1e-12)
    assert np.all(klt_energy - dct_energy < 0.005)


def test_truncation_error_equals_sum_of_discarded_eigenvalues(camera):
    # Eckart–Young–Mirsky: keeping K principal components leaves a mean squared error per
    # patch equal to the sum of the discarded eigenvalues of the second-moment matrix
    # (exact on the fitting data, with the plane's mean removed as the codec removes it).
    patches = tiling.to_patches(camera.astype(float), 8).reshape(-1, 64)
    basis = klt_basis.fit_basis([patches], 8)
    centred = patches - patches.mean()
    for k in (1, 6, 20, 63):
        v = basis.vectors[:, :k]
        err = centred - centred @ v @ v.T
        per_patch = np.mean(np.sum(err**2, axis=1))
        assert np.isclose(per_patch, basis.eigenvalues[k:].sum(), rtol=1e-8)


def test_eigenvalues_descend_and_energy_reaches_one(camera):
    basis = klt_basis.fit_basis([tiling.to_patches(camera.astype(float), 8)], 8)
    assert np.all(np.diff(basis.eigenvalues) <= 1e-9)
    e = basis.energy_kept()
    assert np.all(np.diff(e) >= -1e-12) and np.isclose(e[-1], 1.0)


def test_basis_is_orthonormal_with_a_fixed_sign_convention(camera):
    basis = klt_basis.fit_basis([tiling.to_patches(camera.astype(float), 8)], 8)
    assert np.allclose(basis.vectors.T @ basis.vectors, np.eye(64), atol=1e-10)
    x = -tiling.to_patches(camera.astype(float), 8).reshape(-1, 64)
    x -= x.mean()
    flipped = klt_basis.basis_from_covariance(x.T @ x / len(x), 8)
    assert np.allclose(flipped.vectors, basis.vectors, atol=1e-8)


def test_quantised_vectors_rebuild_exactly_from_their_integers(camera):
    basis = klt_basis.fit_basis([tiling.to_patches(camera.astype(float), 8)], 8)
    ints, bits = klt_basis.quantise_vectors(basis, 64, 4.0)
    s1 = klt_basis.dequantise_vectors(ints, bits)
    s2 = klt_basis.dequantise_vectors(ints.copy(), bits.copy())
    assert np.array_equal(s1, s2)
    assert np.abs(s1 - basis.vectors.T).max() <= 2.0 ** -3 / 2 + 1e-12


def _sparse_tail_grid(value):
    # four dense components, then one lone coefficient in component 40
    rng = np.random.default_rng(3)
    q = np.zeros((32, 32, 64), np.int32)
    q[:, :, :4] = rng.integers(-6, 7, (32, 32, 4))
    q[5, 7, 40] = value
    return q


def test_a_lone_coefficient_far_down_does_not_cost_its_basis_vectors():
    # A stored vector costs n * bits; one coefficient of 1 step is worth ~1 squared step,
    # far less than lambda times those bits (RD_LAMBDA: common practice, from memory).
    from workbench.codecs.klt import rd_kept

    bits = np.full(64, 3, np.uint8)
    assert rd_kept([_sparse_tail_grid(1)], bits, 64) == 4


def test_a_coefficient_far_down_is_kept_when_it_avoids_more_error_than_its_bits_cost():
    from workbench.codecs.klt import RD_LAMBDA, rd_kept

    bits = np.full(64, 3, np.uint8)
    # 200**2 squared steps of error against 37 more vectors of 64 x 3 bits: kept
    assert 200**2 > RD_LAMBDA * 37 * 64 * 3
    assert rd_kept([_sparse_tail_grid(200)], bits, 64) == 41
    # with a shared basis only the coefficient's own few bits are at stake: 1 squared step
    # of error is worth more than RD_LAMBDA x 6 bits
    assert rd_kept([_sparse_tail_grid(1)], None, 64) == 41


def _keep_every_used_component(q, bits, n):
    return max([int(np.flatnonzero(np.any(qp != 0, axis=(0, 1)))[-1]) + 1 for qp in q if qp.any()] or [1])


@pytest.mark.parametrize("name", ["astronaut", "camera", "coffee"])
def test_dropping_sparse_trailing_components_gives_a_better_rate_distortion_curve(name, monkeypatch):
    # Bjontegaard BD-rate (VCEG-M33) at the low rates where components are dropped, against
    # keeping every component with a non-zero coefficient (scikit-image's bundled images).
    from skimage import data

    from workbench import pipeline
    from workbench.quality import bdrate
    from workbench.codecs import klt as klt_codec
    from workbench.formats.imagefiles import SourceImage
    from workbench.settings import Settings

    img = SourceImage(name, getattr(data, name)())
    steps = (20.0, 30.0, 44.0, 64.0)
    ours = pipeline.rd_points(img, Settings(), steps, with_ssim=False)
    monkeypatch.setattr(klt_codec, "rd_kept", _keep_every_used_component)
    every = pipeline.rd_points(img, Settings(), steps, with_ssim=False)
    assert sum(p.bpp for p in ours) < sum(p.bpp for p in every)
    bd = bdrate.bd_rate([p.bpp for p in every], [p.psnr for p in every], [p.bpp for p in ours], [p.psnr for p in ours])
    assert bd < 0, bd


def test_a_per_image_basis_with_more_dimensions_than_patches_stays_affordable(astronaut):
    # 32 x 32 patches of scikit-image's "astronaut": 384 patches for 1024 dimensions. Past
    # the patch count the eigenvalues are rounding noise; storing those vectors once made
    # the bundle 14 bits per pixel. Loose reference: Pillow's JPEG at equal PSNR (VCEG-M33).
    from workbench import pipeline
    from workbench.quality import baselines, bdrate
    from workbench.formats.imagefiles import SourceImage
    from workbench.settings import Settings

    img = SourceImage("astronaut", astronaut)
    ours = pipeline.rd_points(img, Settings(block=32), (4.5, 9.0, 18.0, 30.0), with_ssim=False)
    r = pipeline.encode([img], Settings(block=32, step=30.0)).images[0]
    assert r.kept <= (256 - 1) + 2 * (64 - 1)
    jpeg = baselines.sweep(baselines.get("jpeg"), astronaut, with_ssim=False)
    bd = bdrate.bd_rate([p.bpp for p in jpeg], [p.psnr for p in jpeg], [p.bpp for p in ours], [p.psnr for p in ours])
    assert bd < 200, bd


def test_rdo_levels_only_move_levels_towards_zero_and_leave_the_first_component():
    from workbench.codecs.klt import rdo_levels

    rng = np.random.default_rng(3)
    x = (rng.laplace(size=(64, 4000)) * np.linspace(20, 0.3, 64)[:, None]).astype(np.float32)
    q = np.round(x).astype(np.int32)
    r = rdo_levels(x, q.copy())
    assert r.dtype == np.int32 and r.shape == q.shape
    assert np.array_equal(r[0], q[0])
    assert np.all(np.abs(r) <= np.abs(q)) and np.all(r * q >= 0)
    moved = r != q
    assert moved.any() and np.all(((np.abs(q - r) == 1) | (r == 0))[moved])


def test_rdoq_saves_bits_at_equal_psnr_against_plain_rounding(monkeypatch, astronaut):
    # scikit-image's 'astronaut' (a quarter); BD-rate after Bjøntegaard (VCEG-M33)
    from workbench import pipeline
    from workbench.quality import bdrate
    from workbench.codecs import klt as codec_klt
    from workbench.formats.imagefiles import SourceImage
    from workbench.settings import Settings

    img = SourceImage("a", astronaut[:256, :256])
    steps = (3.0, 4.5, 6.5, 9.0, 13.0, 18.0)
    with_rdoq = pipeline.rd_points(img, Settings(deadzone=0.5), steps, with_ssim=False)
    monkeypatch.setattr(codec_klt, "RDOQ_LAMBDA", 0.0)  # nothing is worth dropping: plain rounding
    plain = pipeline.rd_points(img, Settings(deadzone=0.5), steps, with_ssim=False)
    bd = bdrate.bd_rate([p.bpp for p in plain], [p.psnr for p in plain],
                        [p.bpp for p in with_rdoq], [p.psnr for p in with_rdoq])
    assert bd < -1.0


def test_the_same_image_gives_the_same_bundle_whatever_the_blas_thread_count(camera):
    # A batch worker limits BLAS to one thread (archive._one_core); the app's child process
    # does not. A threaded product sums in a thread-dependent order, which once changed
    # the basis's last bits and the bundle by 49 bytes between the two.
    from threadpoolctl import threadpool_limits

    from workbench import pipeline
    from workbench.formats.imagefiles import SourceImage

    img = [SourceImage("c", camera)]
    threaded = pipeline.encode(img, pipeline.Settings()).data
    with threadpool_limits(1):
        serial = pipeline.encode(img, pipeline.Settings()).data
    assert serial == threaded
