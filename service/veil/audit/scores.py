"""A probe's held-out score of a categorical attribute, and the probes the audit runs (plain data).

Shared by the population's report (:mod:`veil.audit.report`) and the report
within a context (:mod:`veil.audit.context_report`).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

#: Every probe the audit can run, in the order tables list them (and ties for the strongest are broken).
PROBES = ("linear", "quadratic", "kernel", "trees", "mlp")
PROBE_LABELS = {
    "linear": "linear probe",
    "quadratic": "quadratic probe",
    "kernel": "RBF kernel probe",
    "trees": "boosted-trees probe",
    "mlp": "MLP probe",
}


@dataclass(frozen=True)
class ProbeScore:
    """Held-out accuracy of a probe predicting the attribute, against the majority baseline.

    ``gap = |accuracy - majority|`` describes the reading; what is judged is
    :attr:`excess`, the reading *beyond* majority.  ``recall`` holds each class's recall in the order of the report's
    ``classes``; ``balanced_accuracy`` is their mean, whose chance level is
    ``1 / classes`` whatever the class shares.  Cards written before per-class
    figures have no ``recall``.
    """

    accuracy: float
    balanced_accuracy: float
    majority: float
    interval_low: float
    interval_high: float
    n: int
    recall: tuple[float, ...] | None = None

    @property
    def gap(self) -> float:
        return abs(self.accuracy - self.majority)

    @property
    def excess(self) -> float:
        """How far the probe reads the attribute beyond majority: its 95% interval's lower edge above majority.

        0 when the interval reaches majority or lies below it.  One-sided: a
        cross-validated probe with nothing to read scores at or below
        majority (an overfit one on unequal classes about ``Σ p_c²``, not
        ``max p_c``), and a reading below majority is no leakage.
        """
        return max(0.0, self.interval_low - self.majority)

    def with_interval(self) -> str:
        """``accuracy [low, high]`` to three decimals."""
        return f"{self.accuracy:.3f} [{self.interval_low:.3f}, {self.interval_high:.3f}]"

    @property
    def hits(self) -> int:
        """Rows predicted right (an exact count: ``accuracy`` is ``hits / n``)."""
        return round(self.accuracy * self.n)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> ProbeScore:
        recall = data.get("recall")
        return cls(**{**data, "recall": None if recall is None else tuple(recall)})
