"""Small, well-conditioned linear-algebra helpers shared by the erasers and the audit."""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

Float64Array = NDArray[np.float64]


def default_rtol(*shape: int) -> float:
    """Relative cut-off below which a singular value or eigenvalue counts as zero.

    The same rule NumPy's ``matrix_rank`` uses: ``max(shape) * eps``.
    """
    return max(max(shape, default=1), 1) * float(np.finfo(np.float64).eps)


def orthonormal_basis(a: Float64Array, *, rtol: float | None = None) -> Float64Array:
    """Orthonormal basis of the column space of ``a``.

    Parameters
    ----------
    a : ndarray of shape (d, m)
        Columns spanning the subspace.
    rtol : float, optional
        Singular values at or below ``rtol * s_max`` are treated as zero.
        Defaults to :func:`default_rtol`.

    Returns
    -------
    q : ndarray of shape (d, k)
        ``k`` is the numerical rank of ``a`` (possibly 0).
    """
    a = np.asarray(a, dtype=np.float64)
    if a.ndim != 2:
        raise ValueError(f"expected a 2-D array of columns, got {a.ndim}-D")
    if a.size == 0:
        return np.zeros((a.shape[0], 0))
    u, s, _ = np.linalg.svd(a, full_matrices=False)
    cut = (default_rtol(*a.shape) if rtol is None else rtol) * (s[0] if s.size else 0.0)
    rank = int(np.count_nonzero(s > cut))
    return np.ascontiguousarray(u[:, :rank])


def whitening_factors(covariance: Float64Array, *, rtol: float | None = None) -> tuple[Float64Array, Float64Array]:
    """Eigen-factors of the (pseudo-)inverse square root of a covariance matrix.

    ``W = E diag(scale) Eᵀ`` whitens, and ``W⁺ = E diag(1 / scale) Eᵀ``
    un-whitens; eigenvalues at or below ``rtol * λ_max`` are dropped, which is
    what makes rank-deficient covariances (``d > n``, duplicated features) safe.

    Parameters
    ----------
    covariance : ndarray of shape (d, d)
        Symmetric positive semi-definite.
    rtol : float, optional
        Relative eigenvalue cut-off; defaults to :func:`default_rtol`.

    Returns
    -------
    eigenvectors : ndarray of shape (d, r)
        Orthonormal eigenvectors of the retained eigenvalues.
    scale : ndarray of shape (r,)
        ``1 / sqrt(λ)`` for each retained eigenvalue ``λ``.
    """
    eigenvalues, eigenvectors = np.linalg.eigh(np.asarray(covariance, dtype=np.float64))
    top = float(eigenvalues[-1]) if eigenvalues.size else 0.0
    cut = (default_rtol(*covariance.shape) if rtol is None else rtol) * max(top, 0.0)
    keep = eigenvalues > cut
    return np.ascontiguousarray(eigenvectors[:, keep]), 1.0 / np.sqrt(eigenvalues[keep])


def whiten(x: NDArray[np.floating], eigenvectors: Float64Array, scale: Float64Array) -> Float64Array:
    """Apply ``W`` from :func:`whitening_factors` to the rows of ``x`` (shape (n, d) → (n, r))."""
    return (np.asarray(x, dtype=np.float64) @ eigenvectors) * scale


def restrict_to_support(q: Float64Array, covariance: Float64Array, *, rtol: float | None = None) -> Float64Array:
    """Orthonormal basis of the columns of ``q`` projected onto the support of ``covariance``.

    Along a direction where the fitting data has no spread (a dead
    coordinate of an embedding model), removing a component changes nothing
    for that data, but a removed direction with a part there would *write*
    the removed component into it at tiny scale, where a probe that rescales
    features can read it back.  Restricting the directions to the support
    prevents that.

    Parameters
    ----------
    q : ndarray of shape (d, k)
    covariance : ndarray of shape (d, d)
    rtol : float, optional
        Eigenvalue cut-off of the support, as in :func:`whitening_factors`.

    Returns
    -------
    ndarray of shape (d, k')
        ``k' <= k``.
    """
    if q.shape[1] == 0:
        return q
    support, _ = whitening_factors(covariance, rtol=rtol)
    return orthonormal_basis(support @ (support.T @ q))
