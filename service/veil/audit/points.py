"""Operating points as records: the held-out figures of each point of a strength sweep, and the sweep itself.

Plain data (no scikit-learn), so that cards and reports can read them; the
measuring is in :mod:`veil.audit.measure_points`.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any

#: The figures a point has, by the names targets use.
FIGURES = ("linear", "strongest", "nn_attribute", "task", "nn_task", "distortion")


@dataclass(frozen=True)
class PointFigures:
    """Held-out figures of one map (or of the raw rows).

    Attributes
    ----------
    linear : float
        The linear probe's accuracy.
    strongest : float
        The best accuracy of every probe that ran (the linear one included).
    strongest_probe : str
        Which probe that was (one of :data:`veil.audit.report.PROBES`).
    nn_attribute : float
        Share of each row's 10 nearest neighbours (cosine) with its attribute class.
    task, nn_task : float or None
        The linear task probe's accuracy and the neighbours' task share, where a task was given.
    distortion : float
        Relative squared distortion against the raw rows (0 for the raw rows).
    """

    linear: float
    strongest: float
    strongest_probe: str
    nn_attribute: float
    task: float | None
    nn_task: float | None
    distortion: float

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> PointFigures:
        return cls(**data)


@dataclass(frozen=True)
class Baselines:
    """What a point's figures are read against: the majority share and the neighbours' base rates."""

    majority: float
    nn_attribute_base: float
    nn_task_base: float | None

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Baselines:
        return cls(**data)


#: How a point is chosen among those that meet every target.
RULE = "the least distortion among the points that meet every target (the first of equals in grid order)"


@dataclass(frozen=True)
class Sweep:
    """The measured points of a sweep, what they are read against, and the point targets chose (if any)."""

    method: str
    parameter: str
    values: tuple[int | None, ...]
    points: tuple[PointFigures, ...]
    raw: PointFigures
    baselines: Baselines
    targets: tuple[str, ...]
    chosen: int | None

    def to_dict(self) -> dict[str, Any]:
        return {
            "method": self.method,
            "parameter": self.parameter,
            "values": list(self.values),
            "points": [point.to_dict() for point in self.points],
            "raw": self.raw.to_dict(),
            "baselines": self.baselines.to_dict(),
            "targets": list(self.targets),
            "rule": RULE,
            "chosen": None if self.chosen is None else self.values[self.chosen],
            "chosen_index": self.chosen,
            "selection": "chosen on the held-out rows the audit reports: the audit of the chosen point is "
            "optimistic by that choice",
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Sweep:
        return cls(
            method=data["method"],
            parameter=data["parameter"],
            values=tuple(data["values"]),
            points=tuple(PointFigures.from_dict(point) for point in data["points"]),
            raw=PointFigures.from_dict(data["raw"]),
            baselines=Baselines.from_dict(data["baselines"]),
            targets=tuple(data["targets"]),
            chosen=data["chosen_index"],
        )

    def format_table(self) -> str:
        """The points as a text table, the chosen one marked."""
        header = f"{self.parameter:>22}  linear  strongest  nn-attr  task   nn-task  distortion"
        lines = [header, _row("raw", self.raw, "")]
        for index, (value, point) in enumerate(zip(self.values, self.points, strict=True)):
            lines.append(_row(value_text(value), point, "  <- chosen" if index == self.chosen else ""))
        base = self.baselines
        task_base = "" if base.nn_task_base is None else f", nn-task base {base.nn_task_base:.3f}"
        lines.append(f"majority {base.majority:.3f}, nn-attribute base {base.nn_attribute_base:.3f}{task_base}")
        return "\n".join(lines)


def value_text(value: int | None) -> str:
    return "all" if value is None else str(value)


def _figure(value: float | None) -> str:
    return "   -  " if value is None else f"{value:.3f}"


def _row(label: str, point: PointFigures, mark: str) -> str:
    return (
        f"{label:>22}  {point.linear:.3f}   {point.strongest:.3f}    {point.nn_attribute:.3f}   "
        f"{_figure(point.task)}  {_figure(point.nn_task)}   {point.distortion:.4f}{mark}"
    )
