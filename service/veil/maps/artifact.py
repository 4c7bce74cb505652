"""What a fitted eraser exports: its map (of a kind the artifact names) plus the statistics later stages need."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil.maps.kinds import EmbeddingMap
from veil.maps.moments import MomentState
from veil.maps.pins import CoordinatePins
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
        The fitted map, of the kind :attr:`kind` names (see :mod:`veil.maps.kinds`).
    normalize : bool
        Whether served vectors are re-normalised to unit length after erasure.
    moments : MomentState
        Raw-space statistics of the fitting data: the whitening statistics
        (mean and covariance) and, for a categorical attribute, class means
        and priors.  Drift and leakage checks compare live traffic to these.
    history : list of dict
        Per-iteration record of iterative methods (empty otherwise).
    pins : CoordinatePins or None
        Coordinates without live spread in the fitting data, written as its
        mean into every served row (:mod:`veil.maps.pins`); None for a version
        stored before pins existed, which passes them through and so carries
        the attribute there at rounding level.
    """

    method: str
    params: Mapping[str, Any]
    map: EmbeddingMap
    normalize: bool
    moments: MomentState
    history: list[dict[str, float]] = field(default_factory=list)
    pins: CoordinatePins | None = None

    def __post_init__(self) -> None:
        if self.pins is not None:
            self.pins.check_dimension(self.map.dim)

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

    def counterfactual(self, x: NDArray[np.floating], target: int) -> NDArray[np.floating]:
        """Clean a batch and give every row class ``target`` (an index into :attr:`classes`), as it is served.

        For an affine map, ``x' + U Vᵀ (μ_t − μ)``; for class transport, the
        move from each row's inferred class onto class ``t``'s Gaussian.
        """
        class_means = self.class_means
        if class_means is None:
            raise ValueError("counterfactuals by class need a categorical attribute")
        if not 0 <= target < class_means.shape[0]:
            raise ValueError(f"the target class index must lie in range({class_means.shape[0]}), got {target}")
        return self._finish(self.map.counterfactual(x, class_means, target))

    def counterfactual_towards(self, x: NDArray[np.floating], target_mean: Float64Array) -> NDArray[np.floating]:
        """Clean a batch and give every row the component of a target mean ``E[x | z = t]`` (shape (d,)).

        For a version of several attributes, whose target names each one
        (:meth:`veil.maps.moments.MomentState.conditional_mean`).
        """
        return self._finish(self.map.counterfactual(x, np.asarray(target_mean, dtype=np.float64)[None, :], 0))

    def apply(self, x: NDArray[np.floating]) -> NDArray[np.floating]:
        """Erase a batch exactly as it is served (re-normalised if the artifact says so)."""
        return self._finish(self.map.apply(x))

    def _finish(self, out: NDArray[np.floating]) -> NDArray[np.floating]:
        return finish_rows(out, normalize=self.normalize, pins=self.pins)


def finish_rows(out: NDArray[np.floating], *, normalize: bool, pins: CoordinatePins | None) -> NDArray[np.floating]:
    """The steps after any map, in place: re-normalise if asked, then write the pinned coordinates.

    The pinned coordinates are cleared before the norm is taken and written
    after it: a pinned value divided by each row's norm would hand that norm
    (which erasure leaves uneven) to a reader that rescales the coordinate,
    and a norm taken with the map's own values there would leave every row
    a different length once they are overwritten.  Every re-normalised row
    then has the same length, ``sqrt(1 + Σ c_j²)``: 1 to rounding for the
    near-zero coordinates of an embedding model.
    """
    if normalize:
        if pins is not None:
            out[:, pins.coordinates] = 0
        unit_normalize(out)
    return out if pins is None else pins.apply(out)
