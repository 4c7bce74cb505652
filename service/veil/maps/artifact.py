"""What a fitted eraser exports: its map (of a kind the artifact names) plus the statistics later stages need."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil.maps.kinds import EmbeddingMap
from veil.maps.lowrank import AffineLowRankMap
from veil.maps.moments import MomentState
from veil.maps.postprocess import unit_normalize

Float64Array = NDArray[np.float64]


@dataclass(frozen=True, eq=False)
class MapArtifact:
    """A fitted eraser, independent of the estimator class that produced it.

    Attributes
    ----------
    method : str
        ``"leace"``, ``"meanproj"``, ``"inlp"`` or ``"rlace"``.
    params : mapping
        The estimator's constructor parameters.
    map : EmbeddingMap
        The fitted map; today always an :class:`AffineLowRankMap`,
        ``x' = x - U Vᵀ (x - μ)`` (see :mod:`veil.maps.kinds`).
    normalize : bool
        Whether served vectors are re-normalised to unit length after erasure.
    moments : MomentState
        Raw-space statistics of the fitting data: the whitening statistics
        (mean and covariance) and, for a categorical attribute, class means
        and priors.  Drift and leakage checks compare live traffic to these.
    history : list of dict
        Per-iteration record of iterative methods (empty otherwise).
    """

    method: str
    params: Mapping[str, Any]
    map: EmbeddingMap
    normalize: bool
    moments: MomentState
    history: list[dict[str, float]] = field(default_factory=list)

    @property
    def kind(self) -> str:
        """The kind of map held, e.g. ``"affine-lowrank"``."""
        return self.map.kind

    @property
    def classes(self) -> NDArray[np.generic] | None:
        return self.moments.labels

    @property
    def class_means(self) -> Float64Array | None:
        return None if self.moments.labels is None else self.moments.class_means

    @property
    def class_priors(self) -> Float64Array | None:
        return None if self.moments.labels is None else self.moments.class_priors

    @property
    def covariance(self) -> Float64Array:
        return self.moments.covariance_xx

    def counterfactual_shifts(self) -> Float64Array:
        """``U Vᵀ (μ_c − μ)`` for every class ``c``, shape (n_classes, d): what a counterfactual adds after erasure."""
        if self.class_means is None:
            raise ValueError("counterfactuals by class need a categorical attribute")
        if not isinstance(self.map, AffineLowRankMap):
            raise ValueError(f"counterfactuals by class are defined for affine maps, not {self.kind!r}")
        return np.stack([self.map.shift_towards(mean) for mean in self.class_means])

    def apply(self, x: NDArray[np.floating]) -> NDArray[np.floating]:
        """Erase a batch exactly as it is served (re-normalised if the artifact says so)."""
        out = self.map.apply(x)
        return unit_normalize(out) if self.normalize else out
