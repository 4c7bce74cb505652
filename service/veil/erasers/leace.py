"""LEACE: the least-squares concept eraser in closed form."""

from __future__ import annotations

from veil.erasers._base import MomentErasure
from veil.maps.linalg import orthonormal_basis, whitening_factors
from veil.maps.lowrank import AffineLowRankMap
from veil.maps.moments import MomentState


class LEACE(MomentErasure):
    """Closed-form least-squares linear concept erasure (LEACE).

    ``r(x) = x - W⁺ P W (x - μ)``, where ``W`` is the (pseudo-)inverse square
    root of ``Cov(x)`` and ``P`` the orthogonal projection onto the column
    space of ``W Cov(x, z)``.  That space has at most ``C - 1`` dimensions
    for ``C`` classes (as many as the attribute has independent columns if
    numeric); directions whose canonical correlation with ``z`` is below
    :data:`veil.maps.linalg.BASIS_RTOL` count as absent.  After erasure no linear classifier predicts
    ``z`` better than a constant on the fitting distribution (the erased class
    means coincide, ``Cov(r(x), z) = 0``), and among all affine erasers with
    that property ``r`` moves the data least in mean squared distance.

    In factored form, with ``Q`` an orthonormal basis of ``W Cov(x, z)``:
    ``U = W⁺ Q`` and ``V = W Q``, so ``r(x) = x - U Vᵀ (x - μ)``.

    Parameters
    ----------
    eigenvalue_rtol : float, optional
        Eigenvalues of ``Cov(x)`` at or below ``eigenvalue_rtol * λ_max`` are
        treated as zero (rank-deficient covariance: ``d > n``, dead or
        duplicated features).  Default: :data:`veil.maps.linalg.COVARIANCE_RTOL`
        (``1e-10``), far above rounding noise and far below any live spread.
    normalize : bool, default=False
        Re-normalise erased rows to unit length.

    Attributes
    ----------
    map_ : AffineLowRankMap
        The fitted map; ``map_.rank`` is at most ``min(d, m)`` for ``m``
        attribute columns (``C - 1`` for ``C`` classes).
    moments_ : MomentState
        Statistics of the fitting data (float64).
    classes_ : ndarray of shape (n_classes,) or None
    n_features_in_ : int

    Examples
    --------
    >>> import numpy as np
    >>> from veil import LEACE
    >>> rng = np.random.default_rng(0)
    >>> z = rng.integers(0, 2, 500)
    >>> X = rng.normal(size=(500, 8)) + 2.0 * z[:, None]
    >>> eraser = LEACE().fit(X, z)
    >>> X_erased = eraser.transform(X)
    >>> bool(np.allclose(X_erased[z == 0].mean(0), X_erased[z == 1].mean(0)))
    True
    """

    method = "leace"

    def __init__(self, *, eigenvalue_rtol: float | None = None, normalize: bool = False) -> None:
        self.eigenvalue_rtol = eigenvalue_rtol
        self.normalize = normalize

    def _map_from_moments(self, moments: MomentState) -> AffineLowRankMap:
        eigenvectors, scale = whitening_factors(moments.covariance_xx, rtol=self.eigenvalue_rtol)
        # W Cov(x, z̃) in the eigenbasis of Cov(x), with z̃ the whitened attribute: its singular values are the
        # canonical correlations of x and z, at most 1, and it has exactly as many columns as the attribute has
        # independent directions (C - 1 for C classes), so no direction of rounding noise can enter the basis.
        correlations = scale[:, None] * (eigenvectors.T @ moments.standardized_cross_covariance())
        in_basis = orthonormal_basis(correlations, reference=1.0)
        u = eigenvectors @ (in_basis / scale[:, None])  # W⁺ Q
        v = eigenvectors @ (in_basis * scale[:, None])  # W Q
        return AffineLowRankMap(mean=moments.mean_x, u=u, v=v)
