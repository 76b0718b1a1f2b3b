"""Karhunen–Loève transform over image patches.

The basis is the eigenvector matrix of the mean-removed patch covariance
``C = E[(x - m)(x - m)^T]``, eigenvalues in descending order. Keeping the first K
coefficients minimises the expected squared error among all K-term linear transforms;
that error equals the sum of the discarded eigenvalues (Eckart & Young, 1936; Mirsky, 1960).
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from ..errors import InputError


@dataclass(frozen=True)
class Basis:
    """A fitted KLT basis.

    Attributes
    ----------
    vectors : ndarray, shape (n, n)
        Columns are unit eigenvectors (n = B*B), ordered by descending eigenvalue.
    eigenvalues : ndarray, shape (n,)
        Variance of each coefficient on the fitting data (8-bit level units squared).
    block : int
    """

    vectors: np.ndarray
    eigenvalues: np.ndarray
    block: int

    def energy_kept(self) -> np.ndarray:
        """Fraction of the (mean-removed) energy captured by the first K components, K = 1..n."""
        ev = np.clip(self.eigenvalues, 0, None)
        total = ev.sum()
        return np.cumsum(ev) / total if total > 0 else np.ones_like(ev)


@functools.cache
def _blas():
    from threadpoolctl import ThreadpoolController

    return ThreadpoolController()


def serial_blas():
    """A context in which BLAS and LAPACK run on one thread.

    A threaded matrix product sums in an order that depends on the thread count, so the
    same folder gave a basis differing in the last bits, and a bundle 49 bytes longer,
    in a process whose BLAS had been limited to one thread (a batch worker) than in one
    that had not. A basis fit is small next to the coding, so it runs serially everywhere:
    the same input gives the same bytes in every process.
    """
    return _blas().limit(limits=1, user_api="blas")


CHUNK = 1 << 16  # rows per float32 product: ~1e-5 relative error, ample for a basis


class CovarianceAccumulator:
    """Running sums for a patch second-moment matrix, fed in batches (float64)."""

    def __init__(self, n: int):
        self.n = n
        self.count = 0
        self.outer = np.zeros((n, n))

    def add(self, patches: np.ndarray) -> None:
        x = np.asarray(patches)
        if x.dtype != np.float32:
            x = x.astype(np.float64)
        x = x.reshape(-1, self.n)
        self.count += x.shape[0]
        # float32 input is multiplied in float32 (twice as fast) in slices short enough that
        # each partial sum stays accurate, and the slices are summed in float64.
        with serial_blas():
            for i in range(0, x.shape[0], CHUNK):
                c = x[i : i + CHUNK]
                self.outer += c.T @ c

    def second_moment(self) -> np.ndarray:
        """Mean outer product of the patches as given (one patch is enough)."""
        if self.count < 1:
            raise InputError("need at least one patch to fit a basis")
        return self.outer / self.count


def basis_from_covariance(cov: np.ndarray, block: int) -> Basis:
    """Eigendecomposition of a covariance into a :class:`Basis` with a fixed sign convention.

    Each eigenvector is flipped so that its largest-magnitude entry is positive, which makes
    the result independent of the LAPACK routine's arbitrary signs.
    """
    cov = np.asarray(cov, dtype=np.float64)
    n = block * block
    if cov.shape != (n, n) or not np.all(np.isfinite(cov)):
        raise InputError(f"covariance must be a finite {n}x{n} matrix, got shape {cov.shape}")
    cov = 0.5 * (cov + cov.T)
    with serial_blas():
        vals, vecs = np.linalg.eigh(cov)
    order = np.argsort(vals, kind="stable")[::-1]
    vals, vecs = vals[order], vecs[:, order]
    idx = np.argmax(np.abs(vecs), axis=0)
    signs = np.sign(vecs[idx, np.arange(n)])
    signs[signs == 0] = 1
    return Basis(vecs * signs, np.clip(vals, 0, None), block)


def fit_basis(patch_sets, block: int) -> Basis:
    """Fit one basis on several patch arrays, each (..., B*B), means removed per array.

    Removing each plane's own mean keeps a bright luma plane and a mid-grey chroma plane
    from inflating the first component when they are pooled. The basis diagonalises the
    second moment about those plane means, which is what the codec codes: the patches'
    own average pattern is not stored anywhere, so it must be in the basis (and an image
    of a single patch gets a basis that holds that patch).
    """
    acc = CovarianceAccumulator(block * block)
    for patches in patch_sets:
        x = np.asarray(patches)
        x = x.reshape(-1, block * block).astype(np.float32 if x.dtype == np.float32 else np.float64, copy=False)
        acc.add(x - x.mean())  # numpy's pairwise sum keeps a float32 mean accurate
    return basis_from_covariance(acc.second_moment(), block)


def markov_covariance(n: int, rho: float) -> np.ndarray:
    """Covariance of a unit-variance first-order Markov (AR(1)) sequence: ``rho**|i-j|``."""
    i = np.arange(n)
    return rho ** np.abs(i[:, None] - i[None, :])


def dct2_matrix(n: int) -> np.ndarray:
    """Orthonormal DCT-II basis vectors as columns (Ahmed, Natarajan & Rao, 1974)."""
    k = np.arange(n)[None, :]
    i = np.arange(n)[:, None]
    m = np.cos(np.pi * (2 * i + 1) * k / (2 * n)) * np.sqrt(2.0 / n)
    m[:, 0] /= np.sqrt(2.0)
    return m


@functools.cache
def dct_basis(block: int) -> Basis:
    """The separable 2-D DCT-II of ``block`` x ``block`` patches as a fixed :class:`Basis`
    (vectors in row-major patch order; the eigenvalues, unknown, are set to one)."""
    d = dct2_matrix(block)
    return Basis(np.kron(d, d), np.ones(block * block), block)


# ------------------------------------------------------------- compact storage


def quantise_vectors(basis: Basis, count: int, step: float) -> tuple[np.ndarray, np.ndarray]:
    """Quantise the first ``count`` basis vectors for storage in a bundle.

    A vector whose coefficients are large needs a precise direction; one whose coefficients
    barely exceed the quantiser step does not. Vector k gets precision ``2**-bits_k`` with
    ``bits_k = clip(round(log2(sigma_k / step)) + 4, 3, 12)``.

    Returns
    -------
    ints : ndarray of int64, shape (count, n)
    bits : ndarray of uint8, shape (count,)
    """
    sigma = np.sqrt(np.maximum(basis.eigenvalues[:count], 1e-12))
    bits = np.clip(np.round(np.log2(sigma / step)) + 4, 3, 12).astype(np.uint8)
    scale = (2.0 ** bits.astype(np.float64))[:, None]
    ints = np.round(basis.vectors[:, :count].T * scale).astype(np.int64)
    return ints, bits


def dequantise_vectors(ints: np.ndarray, bits: np.ndarray) -> np.ndarray:
    """Synthesis matrix (count, n) from stored integers, exactly as the decoder builds it."""
    return ints.astype(np.float64) / (2.0 ** bits.astype(np.float64))[:, None]
