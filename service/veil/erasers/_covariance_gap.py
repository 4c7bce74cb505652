"""Directions in which the class covariances differ most, in LEACE's whitened space: LEACE's second-moment step.

In the whitened coordinates ``y = W (x - μ)`` the data have identity
covariance, and after LEACE's basis ``Q`` is removed the class means
coincide; what still tells the classes apart by their second moments is
how each class covariance ``S_c = W Σ_c W`` differs from the pooled one.  On
the complement of ``Q`` (orthonormal basis ``C``) the pooled within-class
covariance is exactly the identity (the between-class part lies in
``span Q``), so the differences are ``G_c = Cᵀ S_c C - I`` and they satisfy
``Σ_c p_c G_c = 0``.

Removing a subspace ``P`` of the complement leaves the differences
``(I - P) G_c (I - P)``.  The share it takes out of
``Σ_c p_c ‖G_c‖²_F`` lies between ``tr(P M)`` and ``2 tr(P M)`` with
``M = Σ_c p_c G_c²`` (``‖P G P‖ ≤ ‖P G‖``), and the ``k`` leading
eigenvectors of ``M`` maximise ``tr(P M)`` over rank-``k`` projections
(Ky Fan's maximum principle).  For two classes ``p₀ G₀ = -p₁ G₁``: the
``G_c`` share eigenvectors, those of the generalised eigenproblem
``Σ₁ v = λ Σ_w v`` (``Σ_w`` the pooled within-class covariance, which is
``Σ`` on the complement) ordered by ``|λ - 1|`` (the Fukunaga-Koontz transform),
and removing the leading ones takes out exactly the largest differences.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from veil.maps.linalg import BASIS_RTOL

Float64Array = NDArray[np.float64]


def orthogonal_complement(basis: Float64Array) -> Float64Array:
    """Orthonormal basis of the complement of orthonormal columns ``basis`` (r, k), shape (r, r - k)."""
    r, k = basis.shape
    if k == 0:
        return np.eye(r)
    # The columns are orthonormal, so exactly k singular values are 1 and the rest of U spans the complement.
    u, _, _ = np.linalg.svd(basis, full_matrices=True)
    return np.ascontiguousarray(u[:, k:])


def covariance_gap_directions(
    class_covariances: Float64Array,
    priors: Float64Array,
    whitener: Float64Array,
    basis: Float64Array,
    wanted: int,
) -> Float64Array:
    """The ``wanted`` leading directions of ``M = Σ_c p_c G_c²`` in the complement of ``basis``.

    Parameters
    ----------
    class_covariances : ndarray of shape (m, d, d)
        Population covariance within each class.
    priors : ndarray of shape (m,)
        Share of rows in each class (a class with none is skipped).
    whitener : ndarray of shape (d, r)
        ``E diag(scale)``: the whitening map into the support's ``r`` coordinates.
    basis : ndarray of shape (r, k0)
        Orthonormal directions already removed (LEACE's), in whitened coordinates.
    wanted : int
        How many directions to add.

    Returns
    -------
    ndarray of shape (r, k)
        Orthonormal, orthogonal to ``basis``, in decreasing order of ``M``'s
        eigenvalue.  ``k ≤ wanted``: at most the complement's dimension;
        eigenvalues at or below :data:`~veil.maps.linalg.BASIS_RTOL` of the
        largest (class covariances that agree) are not taken; and where the
        ``k``-th and the next eigenvalue tie within that cut, which vector of
        the tied space to take would be decided by round-off, so the tied
        ones are left out.
    """
    complement = orthogonal_complement(basis)
    if wanted == 0 or complement.shape[1] == 0:
        return np.zeros((basis.shape[0], 0))
    to_complement = whitener @ complement  # (d, r - k0): raw coordinates to the complement's whitened ones
    identity = np.eye(complement.shape[1])
    spread = np.zeros_like(identity)
    for prior, covariance in zip(priors, class_covariances, strict=True):
        if prior > 0:
            gap = to_complement.T @ covariance @ to_complement - identity
            gap = (gap + gap.T) / 2
            spread += prior * (gap @ gap)
    eigenvalues, eigenvectors = np.linalg.eigh(spread)
    eigenvalues, eigenvectors = eigenvalues[::-1], eigenvectors[:, ::-1]
    cut = BASIS_RTOL * max(float(eigenvalues[0]), 0.0)
    keep = min(wanted, int(np.count_nonzero(eigenvalues > cut)))
    while 0 < keep < eigenvalues.size and eigenvalues[keep - 1] - eigenvalues[keep] <= cut:
        keep -= 1
    return np.ascontiguousarray(complement @ eigenvectors[:, :keep])
