"""Mean projection: remove the span of the class-mean differences orthogonally."""

from __future__ import annotations

from veil.erasers._base import MomentErasure
from veil.maps.linalg import orthonormal_basis, restrict_to_support
from veil.maps.lowrank import AffineLowRankMap
from veil.maps.moments import MomentState


class MeanProjection(MomentErasure):
    """Orthogonal projection that removes the span of the class-mean differences.

    For a categorical attribute, column ``c`` of ``Cov(x, z)`` is
    ``p_c (μ_c - μ)``, so its column space is the span of the class-mean
    offsets; for a numeric attribute it is the span of the covariances with
    each attribute column.  Projecting it out makes the class means coincide
    (linear guardedness) while keeping the map orthogonal: ``U = V = Q``.

    Parameters
    ----------
    normalize : bool, default=False
        Re-normalise erased rows to unit length.

    Attributes
    ----------
    map_ : AffineLowRankMap
    moments_ : MomentState
    classes_ : ndarray of shape (n_classes,) or None
    n_features_in_ : int
    """

    method = "meanproj"

    def __init__(self, *, normalize: bool = False) -> None:
        self.normalize = normalize

    def _map_from_moments(self, moments: MomentState) -> AffineLowRankMap:
        # Cov(x, z̃) spans the same offsets with exactly C - 1 columns for C classes (see MomentState).
        q = restrict_to_support(orthonormal_basis(moments.standardized_cross_covariance()), moments.covariance_xx)
        return AffineLowRankMap(mean=moments.mean_x, u=q, v=q)
