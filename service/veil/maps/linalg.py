"""Small, well-conditioned linear-algebra helpers shared by the erasers and the audit.

Every rank these helpers decide is decided on *estimated* statistics: float64
moments of float32 or float64 rows.  Such statistics carry rounding noise of
order ``eps · ‖Σ‖`` (about ``1e-16`` to ``1e-13`` of the largest value, with
the BLAS kernels and the summation order of the machine), while any spread
the data really have sits far above it: a float32 embedding's own
quantisation is about ``1e-14`` of its top eigenvalue, and the smallest live
eigenvalue of the committed MiniLM sample is ``6e-5`` of the top one.  The
cuts below sit between the two, several orders of magnitude from each, so
that no rank depends on round-off; where the structure of the problem bounds
a rank (``C - 1`` for ``C`` classes), callers pass that bound instead.
"""

from __future__ import annotations

import functools

import numpy as np
from numpy.typing import NDArray
from threadpoolctl import ThreadpoolController

Float64Array = NDArray[np.float64]

# Eigenvalues of an estimated covariance at or below this share of the largest count as zero (a spread below
# 1e-5 of the largest standard deviation: dead coordinates, d > n, duplicated features).
COVARIANCE_RTOL = 1e-10
# Singular values of an estimated cross-statistic at or below this share of the reference count as zero.
BASIS_RTOL = 1e-9


def orthonormal_basis(
    a: Float64Array, *, rtol: float = BASIS_RTOL, reference: float | None = None, max_rank: int | None = None
) -> Float64Array:
    """Orthonormal basis of the column space of ``a``.

    Parameters
    ----------
    a : ndarray of shape (d, m)
        Columns spanning the subspace.
    rtol : float, default=BASIS_RTOL
        Singular values at or below ``rtol * reference`` are treated as zero.
    reference : float, optional
        The scale the cut is relative to; defaults to the largest singular
        value of ``a``.  Pass 1 when the singular values are bounded by 1
        (correlations, projections of orthonormal columns).
    max_rank : int, optional
        A bound the structure of the problem puts on the rank (``C - 1`` for
        ``C`` classes): directions beyond it are round-off and never kept.

    Returns
    -------
    q : ndarray of shape (d, k)
        ``k`` is the rank of ``a`` under the cut and the bound (possibly 0).
    """
    a = np.asarray(a, dtype=np.float64)
    if a.ndim != 2:
        raise ValueError(f"expected a 2-D array of columns, got {a.ndim}-D")
    if a.size == 0:
        return np.zeros((a.shape[0], 0))
    u, s, _ = np.linalg.svd(a, full_matrices=False)
    scale = float(s[0]) if reference is None else reference
    rank = int(np.count_nonzero(s > rtol * scale))
    if max_rank is not None:
        rank = min(rank, max_rank)
    return np.ascontiguousarray(u[:, :rank])


def extend_basis(q: Float64Array, new: Float64Array, *, max_rank: int | None = None) -> Float64Array:
    """Orthonormal basis of the span of ``q`` and ``new``, with ``q`` kept as its first columns.

    The part of ``new`` outside ``span(q)`` is kept where it is more than
    :data:`BASIS_RTOL` of ``new``'s own largest singular value: a direction
    ``new`` only repeats up to rounding is not added.

    Parameters
    ----------
    q : ndarray of shape (d, k)
        Orthonormal columns.
    new : ndarray of shape (d, m)
        Columns to add.
    max_rank : int, optional
        Bound on the number of directions ``new`` can add (see :func:`orthonormal_basis`).

    Returns
    -------
    ndarray of shape (d, k + k')
    """
    new = np.asarray(new, dtype=np.float64)
    if new.size == 0:
        return q
    largest = float(np.linalg.norm(new, ord=2))
    residual = new - q @ (q.T @ new)
    added = orthonormal_basis(residual, reference=largest, max_rank=max_rank)
    return np.ascontiguousarray(np.column_stack([q, added]))


@functools.cache
def _threads() -> ThreadpoolController:
    # Made once, on first use: a controller inspects the loaded libraries, which costs about a millisecond.
    return ThreadpoolController()


def _eigh(matrix: Float64Array) -> tuple[Float64Array, Float64Array]:
    """``np.linalg.eigh`` with BLAS on one thread.

    LAPACK's symmetric eigen-solver synchronises its threads at every step of the reduction to tridiagonal
    form; on a machine whose other cores are busy, OpenBLAS's second thread spin-waits for a core and one
    768 × 768 decomposition took 0.2-3.3 s on two threads against 0.11-0.19 s on one (docs/performance.md,
    B3).  One thread is also the service's setting.
    """
    with _threads().limit(limits=1, user_api="blas"):
        eigenvalues, eigenvectors = np.linalg.eigh(matrix)
    return eigenvalues, eigenvectors


def whitening_factors(
    covariance: Float64Array, *, rtol: float | None = None, rank: int | None = None
) -> tuple[Float64Array, Float64Array]:
    """Eigen-factors of the (pseudo-)inverse square root of a covariance matrix.

    ``W = E diag(scale) Eᵀ`` whitens, and ``W⁺ = E diag(1 / scale) Eᵀ``
    un-whitens; eigenvalues at or below ``rtol * λ_max`` are dropped, which is
    what makes rank-deficient covariances (``d > n``, dead or duplicated
    features) safe.

    Parameters
    ----------
    covariance : ndarray of shape (d, d)
        Symmetric positive semi-definite.
    rtol : float, optional
        Relative eigenvalue cut-off; defaults to :data:`COVARIANCE_RTOL`.
    rank : int, optional
        Keep exactly the ``rank`` largest eigenvalues instead of cutting: for
        a covariance whose rank the structure of the problem fixes (the
        indicators of ``C`` classes span ``C - 1`` dimensions).

    Returns
    -------
    eigenvectors : ndarray of shape (d, r)
        Orthonormal eigenvectors of the retained eigenvalues.
    scale : ndarray of shape (r,)
        ``1 / sqrt(λ)`` for each retained eigenvalue ``λ``.
    """
    eigenvalues, eigenvectors = _eigh(np.asarray(covariance, dtype=np.float64))
    if rank is not None:
        keep = np.zeros(eigenvalues.size, dtype=bool)
        keep[max(eigenvalues.size - rank, 0) :] = True
        keep &= eigenvalues > 0
    else:
        top = float(eigenvalues[-1]) if eigenvalues.size else 0.0
        keep = eigenvalues > (COVARIANCE_RTOL if rtol is None else rtol) * max(top, 0.0)
    return np.ascontiguousarray(eigenvectors[:, keep]), 1.0 / np.sqrt(eigenvalues[keep])


def dead_coordinates(covariance: Float64Array) -> NDArray[np.intp]:
    """Coordinates whose variance is at most :data:`COVARIANCE_RTOL` of the largest coordinate's.

    Embedding models leave a few such coordinates (all-MiniLM-L6-v2 has three,
    with values near 1e-33 and 1e-8): they carry nothing a dot product sees.

    Parameters
    ----------
    covariance : ndarray of shape (d, d)

    Returns
    -------
    ndarray of shape (n_dead,), in increasing order
    """
    variances = np.diag(np.asarray(covariance, dtype=np.float64))
    top = float(variances.max()) if variances.size else 0.0
    return np.flatnonzero(variances <= COVARIANCE_RTOL * max(top, 0.0))


def whiten(x: NDArray[np.floating], eigenvectors: Float64Array, scale: Float64Array) -> Float64Array:
    """Apply ``W`` from :func:`whitening_factors` to the rows of ``x`` (shape (n, d) → (n, r))."""
    return (np.asarray(x, dtype=np.float64) @ eigenvectors) * scale


def restrict_to_support(q: Float64Array, covariance: Float64Array) -> Float64Array:
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
        Orthonormal columns.
    covariance : ndarray of shape (d, d)

    Returns
    -------
    ndarray of shape (d, k')
        ``k' <= k``; a column that lies (up to :data:`BASIS_RTOL`) outside the
        support is dropped.
    """
    if q.shape[1] == 0:
        return q
    support, _ = whitening_factors(covariance)
    # Projections of orthonormal columns have singular values at most 1: the cut is relative to 1.
    return orthonormal_basis(support @ (support.T @ q), reference=1.0)
