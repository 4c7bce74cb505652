"""LEACE: the least-squares concept eraser in closed form."""

from __future__ import annotations

import warnings

import numpy as np

from veil.erasers._base import MomentErasure
from veil.erasers._covariance_gap import covariance_gap_directions
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

    **Second-moment directions** (``covariance_directions=k``, categorical
    attributes): LEACE leaves the class covariances as they were, and a
    reader of second moments (a quadratic or kernel probe, neighbourhoods)
    still tells the classes apart by them.  With ``k > 0``, ``Q`` is extended
    by ``k`` orthonormal directions of the whitened space, orthogonal to
    LEACE's, along which the whitened class covariances ``W Σ_c W`` differ
    most: the leading eigenvectors of ``M = Σ_c p_c (Cᵀ W Σ_c W C - I)²``
    on the complement ``C`` of LEACE's basis, where the pooled within-class
    covariance is the identity.  For two classes these are the directions
    of the generalised eigenproblem ``Σ₁ v = λ Σ_w v`` (``Σ_w`` the pooled
    within-class covariance) farthest from ``λ = 1`` (the Fukunaga-Koontz
    transform); for more classes they maximise ``tr(P M)`` over rank-k
    projections ``P`` (Ky Fan's maximum principle), which bounds the share
    of the covariance differences removed within a factor of 2 (see
    :mod:`veil.erasers._covariance_gap`).  The whole basis is removed
    obliquely as above, so the LEACE guarantee still holds, the class
    covariances along the added directions are removed with them, and the
    map moves the data more (each added direction removes one unit of
    whitened variance).  Counterfactuals restore the class mean only.
    Fitting needs per-class co-moments (one d×d float64 matrix per class),
    which are accumulated only when ``k > 0``.

    **Within a context** (``fit(X, z, given=context)``): a ranker compares
    items of one category, so the attribute must not be readable among
    items of the same context value.  ``Q`` then spans every value's
    ``W Cov(x, z | g)`` as well (see :mod:`veil.maps.context`), so that
    ``Cov(r(x), z | g) = 0`` for every value ``g`` on the fitting rows, and
    ``r`` is still the affine map with that property that moves the data
    least (the least-squares argument holds for any fixed set of columns to
    remove).  With ``guard_population=False`` only the within-value columns
    are removed: what the context legitimately says about the attribute
    (fields skewed by gender, say) then stays readable across values.

    Parameters
    ----------
    covariance_directions : int, default=0
        ``k``, the second-moment directions to add; 0 is LEACE alone.  At
        most the rest of the whitened space is taken, and fewer where the
        class covariances agree or the next directions tie (a warning says
        so): round-off never picks a direction.
    eigenvalue_rtol : float, optional
        Eigenvalues of ``Cov(x)`` at or below ``eigenvalue_rtol * λ_max`` are
        treated as zero (rank-deficient covariance: ``d > n``, dead or
        duplicated features).  Default: :data:`veil.maps.linalg.COVARIANCE_RTOL`
        (``1e-10``), far above rounding noise and far below any live spread.
    guard_population : bool, default=True
        With a context, also guard the population as a whole; without one the population is always guarded.
    normalize : bool, default=False
        Re-normalise erased rows to unit length.

    Attributes
    ----------
    map_ : AffineLowRankMap
        The fitted map; ``map_.rank`` is at most ``min(d, m)`` for ``m``
        attribute columns (``C - 1`` for ``C`` classes).
    moments_ : MomentState
        Statistics of the fitting data (float64); with per-class co-moments when ``covariance_directions > 0``.
    n_covariance_directions_ : int
        Second-moment directions removed (the last columns of ``map_.u``).
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

    def __init__(
        self,
        *,
        covariance_directions: int = 0,
        eigenvalue_rtol: float | None = None,
        guard_population: bool = True,
        normalize: bool = False,
    ) -> None:
        self.covariance_directions = covariance_directions
        self.eigenvalue_rtol = eigenvalue_rtol
        self.guard_population = guard_population
        self.normalize = normalize

    @property
    def needs_class_moments(self) -> bool:
        k = self.covariance_directions
        if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 0:
            raise ValueError(f"covariance_directions must be a non-negative integer, got {k!r}")
        return bool(k > 0)

    def _map_from_moments(self, moments: MomentState) -> AffineLowRankMap:
        eigenvectors, scale = whitening_factors(moments.covariance_xx, rtol=self.eigenvalue_rtol)
        # W Cov(x, z̃) in the eigenbasis of Cov(x), with z̃ the whitened attribute: its singular values are the
        # canonical correlations of x and z, at most 1, and it has exactly as many columns as the attribute has
        # independent directions (C - 1 for C classes), so no direction of rounding noise can enter the basis.
        # Within a context, each value's whitened attribute stacked (and the population's before them): the
        # singular values are bounded all the same (see MomentState.guarded_cross_covariance).
        guarded, bound = moments.guarded_cross_covariance(population=self.guard_population)
        correlations = scale[:, None] * (eigenvectors.T @ guarded)
        in_basis = orthonormal_basis(correlations, reference=bound)
        self.n_covariance_directions_ = 0
        if self.needs_class_moments:
            added = covariance_gap_directions(
                moments.class_covariances,
                moments.class_priors,
                eigenvectors * scale,
                in_basis,
                int(self.covariance_directions),
            )
            self.n_covariance_directions_ = added.shape[1]
            in_basis = np.column_stack([in_basis, added])
        u = eigenvectors @ (in_basis / scale[:, None])  # W⁺ Q
        v = eigenvectors @ (in_basis * scale[:, None])  # W Q
        return AffineLowRankMap(mean=moments.mean_x, u=u, v=v)

    def _fit_state(self, moments: MomentState) -> LEACE:
        super()._fit_state(moments)
        # Only a whole fit warns: a partial fit's early chunks are expected to support fewer directions.
        if self.n_covariance_directions_ < self.covariance_directions:
            warnings.warn(
                f"LEACE removed {self.n_covariance_directions_} of the {self.covariance_directions} covariance "
                "directions asked for: the whitened space beside LEACE's directions is smaller, or the class "
                "covariances agree or tie beyond them",
                UserWarning,
                stacklevel=3,
            )
        return self
