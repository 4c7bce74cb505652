"""The typed audit report: what an auditor reads, serialisable to and from JSON."""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass, field
from typing import Any


@dataclass(frozen=True)
class ProbeScore:
    """Held-out accuracy of a probe predicting the attribute, against the majority baseline.

    ``gap = |accuracy - majority|``: accuracy far *below* majority on held-out
    data is leakage too (the probe has learned the attribute, inverted).
    """

    accuracy: float
    balanced_accuracy: float
    majority: float
    interval_low: float
    interval_high: float
    n: int

    @property
    def gap(self) -> float:
        return abs(self.accuracy - self.majority)


@dataclass(frozen=True)
class RegressionScore:
    """Held-out R² of a ridge probe predicting a numeric attribute (0 means no linear leakage)."""

    r2: float
    n: int


@dataclass(frozen=True)
class Leakage:
    """How much of the attribute a probe recovers before and after erasure."""

    linear_before: ProbeScore | RegressionScore
    linear_after: ProbeScore | RegressionScore
    nonlinear_before: ProbeScore | None
    nonlinear_after: ProbeScore | None
    guardedness_gap_before: float | None
    guardedness_gap_after: float | None
    guardedness_noise_floor: float | None = None


@dataclass(frozen=True)
class Utility:
    """How much of the embedding's useful signal survives erasure."""

    relative_distortion: float
    mean_cosine: float
    knn_overlap_at_10: float
    task_accuracy_before: float | None = None
    task_accuracy_after: float | None = None
    tpr_gap_rms_before: float | None = None
    tpr_gap_rms_after: float | None = None


@dataclass(frozen=True)
class Retrieval:
    """Share of each vector's 10 nearest neighbours (cosine) that share its attribute or task label."""

    attribute_share_before: float
    attribute_share_after: float
    attribute_base_rate: float
    task_share_before: float | None = None
    task_share_after: float | None = None
    task_base_rate: float | None = None


@dataclass(frozen=True)
class AuditReport:
    """The audit of one eraser on held-out data."""

    method: str
    rank: int
    n_heldout: int
    dim: int
    leakage: Leakage
    utility: Utility
    retrieval: Retrieval | None
    notes: list[str] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    def to_json(self, **kwargs: Any) -> str:
        return json.dumps(self.to_dict(), **kwargs)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> AuditReport:
        leakage = dict(data["leakage"])
        for key in ("linear_before", "linear_after", "nonlinear_before", "nonlinear_after"):
            value = leakage[key]
            if value is not None:
                leakage[key] = RegressionScore(**value) if "r2" in value else ProbeScore(**value)
        retrieval = data.get("retrieval")
        return cls(
            method=data["method"],
            rank=data["rank"],
            n_heldout=data["n_heldout"],
            dim=data["dim"],
            leakage=Leakage(**leakage),
            utility=Utility(**data["utility"]),
            retrieval=None if retrieval is None else Retrieval(**retrieval),
            notes=list(data.get("notes", [])),
        )

    @classmethod
    def from_json(cls, text: str) -> AuditReport:
        return cls.from_dict(json.loads(text))

    def format_table(self) -> str:
        """A plain-text before/after table for terminals and READMEs."""
        rows: list[tuple[str, str, str]] = []

        def probe(label: str, before: object, after: object) -> None:
            if isinstance(before, ProbeScore) and isinstance(after, ProbeScore):
                rows.append((f"{label} accuracy", _ci(before), _ci(after)))
                rows.append(
                    (f"{label} balanced accuracy", f"{before.balanced_accuracy:.3f}", f"{after.balanced_accuracy:.3f}")
                )
                rows.append((f"{label} |accuracy - majority|", f"{before.gap:.3f}", f"{after.gap:.3f}"))
            elif isinstance(before, RegressionScore) and isinstance(after, RegressionScore):
                rows.append((f"{label} R²", f"{before.r2:.3f}", f"{after.r2:.3f}"))

        lk = self.leakage
        majority = lk.linear_before.majority if isinstance(lk.linear_before, ProbeScore) else None
        if majority is not None:
            rows.append(("majority baseline", f"{majority:.3f}", f"{majority:.3f}"))
        probe("linear probe", lk.linear_before, lk.linear_after)
        probe("nonlinear probe (MLP)", lk.nonlinear_before, lk.nonlinear_after)
        if lk.guardedness_gap_before is not None and lk.guardedness_gap_after is not None:
            floor = "" if lk.guardedness_noise_floor is None else f" (noise {lk.guardedness_noise_floor:.2f})"
            rows.append(
                (
                    "max whitened class-mean gap" + floor,
                    f"{lk.guardedness_gap_before:.3f}",
                    f"{lk.guardedness_gap_after:.3f}",
                )
            )
        ut = self.utility
        rows.append(("relative squared distortion", "0", f"{ut.relative_distortion:.4f}"))
        rows.append(("mean cosine(x, x')", "1", f"{ut.mean_cosine:.4f}"))
        rows.append(("10-NN overlap with raw", "1", f"{ut.knn_overlap_at_10:.3f}"))
        if ut.task_accuracy_before is not None and ut.task_accuracy_after is not None:
            rows.append(("task probe accuracy", f"{ut.task_accuracy_before:.3f}", f"{ut.task_accuracy_after:.3f}"))
        if ut.tpr_gap_rms_before is not None and ut.tpr_gap_rms_after is not None:
            rows.append(("task TPR gap (RMS)", f"{ut.tpr_gap_rms_before:.3f}", f"{ut.tpr_gap_rms_after:.3f}"))
        if self.retrieval is not None:
            rt = self.retrieval
            base = f" (base {rt.attribute_base_rate:.3f})"
            rows.append(
                (
                    "10-NN sharing attribute" + base,
                    f"{rt.attribute_share_before:.3f}",
                    f"{rt.attribute_share_after:.3f}",
                )
            )
            if rt.task_share_before is not None and rt.task_share_after is not None and rt.task_base_rate is not None:
                rows.append(
                    (
                        f"10-NN sharing task (base {rt.task_base_rate:.3f})",
                        f"{rt.task_share_before:.3f}",
                        f"{rt.task_share_after:.3f}",
                    )
                )
        width = max(len(r[0]) for r in rows)
        lines = [
            f"{self.method} eraser, rank {self.rank}, "
            f"audited on {self.n_heldout} held-out rows of dimension {self.dim}",
            f"{'':{width}}  {'before':>21}  {'after':>21}",
        ]
        lines += [f"{name:{width}}  {b:>21}  {a:>21}" for name, b, a in rows]
        lines += [f"note: {n}" for n in self.notes]
        return "\n".join(lines)


def _ci(score: ProbeScore) -> str:
    return f"{score.accuracy:.3f} [{score.interval_low:.3f}, {score.interval_high:.3f}]"
