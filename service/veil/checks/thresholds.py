"""Thresholds of the drift and leakage checks and of the audits, stored in every version's card.

Each figure has a ``warn`` and an ``alert`` level; a check's status is the
worst level any figure reaches.  The defaults are common-practice starting
points, not derived values: tune them per eraser from the figures its own
traffic shows when nothing is wrong.

==========================  ===========================================================================
figure                      meaning
==========================  ===========================================================================
``leakage_gap``             |probe accuracy − majority| on erased live vectors (labels or pseudo-labels)
``mean_shift``              distance of the live mean from the fit's, in the fit's whitened units,
                            beyond what sampling alone gives for the sample size
``covariance_shift``        relative Frobenius distance of the whitened live covariance from identity
``erased_variance_ratio``   share of live variance in the erased directions ÷ the fit data's share
``prior_shift``             total-variation distance between live and fitted class priors
``context_leakage_gap``     the leakage gap within a context: the probe trained and tested within each
                            value of a posted context column, pooled by rows, its interval's lower edge
                            above the floor (what the context alone tells)
==========================  ===========================================================================
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, fields
from typing import Any, Self


@dataclass(frozen=True)
class Band:
    """``warn`` ≤ ``alert``; a figure at or above a level reaches it."""

    warn: float
    alert: float

    def __post_init__(self) -> None:
        if not (math.isfinite(self.warn) and math.isfinite(self.alert) and 0 <= self.warn <= self.alert):
            raise ValueError(f"a threshold band needs 0 <= warn <= alert, got warn={self.warn}, alert={self.alert}")

    def level(self, value: float | None) -> str:
        """``"alert"``, ``"warn"`` or ``"ok"`` for a figure (``"ok"`` when there is none).

        The figure is compared at 9 decimals: a difference such as 0.57 − 0.52
        (0.04999… in binary) reaches a level of 0.05, so round-off never
        decides which side of a level a figure falls.
        """
        if value is None:
            return "ok"
        rounded = round(value, 9)
        return "alert" if rounded >= self.alert else "warn" if rounded >= self.warn else "ok"


@dataclass(frozen=True)
class _BandSet:
    """A dataclass of :class:`Band` fields, written to and read from a card as ``{figure: {warn, alert}}``."""

    def to_dict(self) -> dict[str, dict[str, float]]:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Self:
        """Thresholds from a card or settings; figures left out keep their defaults, unknown ones are refused."""
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(data) - known)
        if unknown:
            raise ValueError(f"unknown threshold {unknown[0]!r}; known: {', '.join(sorted(known))}")
        return cls(**{key: Band(float(value["warn"]), float(value["alert"])) for key, value in data.items()})


@dataclass(frozen=True)
class AlertThresholds(_BandSet):
    """The levels at which each drift or leakage figure warns or alerts."""

    leakage_gap: Band = Band(0.02, 0.05)
    mean_shift: Band = Band(0.5, 1.0)
    covariance_shift: Band = Band(0.25, 0.5)
    erased_variance_ratio: Band = Band(2.0, 4.0)
    prior_shift: Band = Band(0.1, 0.2)
    context_leakage_gap: Band = Band(0.02, 0.05)


@dataclass(frozen=True)
class AuditThresholds(_BandSet):
    """The levels at which each figure of an audit (at fitting time or on a fresh sample) warns or alerts.

    ==========================  ===============================================================================
    figure                      meaning
    ==========================  ===============================================================================
    ``linear_gap``              the linear probe after erasure: how far the lower edge of its 95% interval lies
                                above the majority baseline (0 when it reaches majority or lies below)
    ``strongest_gap``           the same for the probe reading farthest beyond majority after erasure
    ``neighbour_excess``        share of each row's 10 nearest neighbours with its attribute, above the base
                                rate (the share a neighbourhood blind to the attribute would have)
    ``task_loss``               task probe accuracy lost to erasure (raw minus erased)
    ``context_linear_gap``      within a context: the linear probe, trained and tested within each value and
                                pooled by rows, after erasure: the lower edge of its 95% interval above the
                                floor (what the context alone tells; 0 when it reaches the floor or lies below)
    ``context_strongest_gap``   the same for the probe reading farthest beyond the floor within the context
    ``context_neighbour_excess`` within a context: the 10-NN attribute share among rows of the same value, above
                                the same value's base rate, weighted by rows
    ==========================  ===============================================================================

    The ``context_*`` figures are judged only where the audited rows carried a
    context.  The defaults are common-practice starting points, not derived
    values; those within a context are the population's.
    """

    linear_gap: Band = Band(0.02, 0.05)
    strongest_gap: Band = Band(0.05, 0.10)
    neighbour_excess: Band = Band(0.05, 0.10)
    task_loss: Band = Band(0.02, 0.05)
    context_linear_gap: Band = Band(0.02, 0.05)
    context_strongest_gap: Band = Band(0.05, 0.10)
    context_neighbour_excess: Band = Band(0.05, 0.10)
