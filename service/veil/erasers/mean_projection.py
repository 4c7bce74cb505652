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
    Within a context (``fit(X, z, given=context)``), the span of each
    value's class-mean offsets from the value's own mean is removed too, so
    the class means coincide within every value.

    Parameters
    ----------
    guard_population : bool, default=True
        With a context, also guard the population as a whole.
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

    def __init__(self, *, guard_population: bool = True, normalize: bool = False) -> None:
        self.guard_population = guard_population
        self.normalize = normalize

    def _map_from_moments(self, moments: MomentState) -> AffineLowRankMap:
        # Cov(x, z̃) spans the same offsets with exactly C - 1 columns for C classes (see MomentState); within a
        # context, each value's offsets from its own mean.
        guarded, _ = moments.guarded_cross_covariance(population=self.guard_population)
        q = restrict_to_support(orthonormal_basis(guarded), moments.covariance_xx)
        return AffineLowRankMap(mean=moments.mean_x, u=q, v=q)
