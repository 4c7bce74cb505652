"""The audit within a context, as records: what each reader reads among rows of one context value, and the floor.

A ranker compares items of one category (one opening, one query's topic),
so what matters there is whether the attribute can be read *among items of
the same context value*.  Each reader is trained and tested within each
value; its figure is the share of rows it labels right, pooled over the
values (weighted by rows).  The **floor** is what the context alone tells:
within each value, the share of its commonest class, pooled the same way.
A reading is judged by its excess over the floor ("beyond the context"),
with the one-sided rule of :attr:`~veil.audit.report.ProbeScore.excess`: each
score here is a :class:`~veil.audit.report.ProbeScore` whose ``majority`` is
the floor.

Plain data (no scikit-learn), so that cards and reports can read them; the
measuring is in :mod:`veil.audit.within`.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

from veil.audit.scores import PROBE_LABELS, PROBES, ProbeScore

#: What the floor means, in one sentence (the report and ``veil show`` print it).
FLOOR_MEANING = (
    "The floor is what the context alone tells: within each value, the share of its commonest class of the "
    "attribute, weighted by rows; a reader at the floor reads nothing beyond the context."
)


def _scores(data: dict[str, Any]) -> dict[str, ProbeScore]:
    return {name: ProbeScore.from_dict(score) for name, score in data.items()}


def rounded_excess(score: ProbeScore) -> float:
    """:attr:`ProbeScore.excess` at 9 decimals, so that round-off never decides which value or reader is worse."""
    return round(score.excess, 9)


@dataclass(frozen=True)
class ContextValue:
    """One value of the context: its audited rows, its floor, and each reader's score there before and after.

    ``before`` and ``after`` map each reader that ran (names of
    :data:`~veil.audit.report.PROBES`) to its score on the raw and the
    erased rows of this value; every score's ``majority`` is this value's floor.
    """

    value: str
    rows: int
    floor: float
    before: dict[str, ProbeScore]
    after: dict[str, ProbeScore]

    @property
    def excess(self) -> float:
        """The largest excess over the floor of any reader after erasure (rounded as :func:`rounded_excess`)."""
        return max(rounded_excess(score) for score in self.after.values())

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> ContextValue:
        return cls(
            value=data["value"],
            rows=data["rows"],
            floor=data["floor"],
            before=_scores(data["before"]),
            after=_scores(data["after"]),
        )


@dataclass(frozen=True)
class SkippedValue:
    """A context value the readers could not be cross-validated within, and why."""

    value: str
    rows: int
    reason: str


@dataclass(frozen=True)
class ContextAudit:
    """Every reader within each value of a context, pooled over the values by rows, against the floor.

    Attributes
    ----------
    column : str or None
        The context column (None when the caller did not name it).
    rows : int
        Audited rows in the values read (the skipped values' rows are not among them).
    floor : float
        What the context alone tells: each value's majority share, weighted by rows.
    before, after : dict of str to ProbeScore
        Each reader's score pooled over the values read, on the raw and the erased rows (``majority`` is the floor).
    values : tuple of ContextValue
        Each value read, sorted by value.
    skipped : tuple of SkippedValue
        The values too small to cross-validate within, with why.
    nn_share_before, nn_share_after, nn_base_rate : float or None
        Share of each row's 10 nearest neighbours among rows of its own value that share its attribute, and the
        share random neighbours of the same value would have, weighted by rows (None: no value has the rows).
    worst : str or None
        Derived: the value with the highest excess of any reader after erasure (ties go to the first value).
    """

    column: str | None
    rows: int
    floor: float
    before: dict[str, ProbeScore]
    after: dict[str, ProbeScore]
    values: tuple[ContextValue, ...]
    skipped: tuple[SkippedValue, ...]
    nn_share_before: float | None = None
    nn_share_after: float | None = None
    nn_base_rate: float | None = None
    worst: str | None = field(init=False)

    def __post_init__(self) -> None:
        worst = max(self.values, key=lambda value: value.excess, default=None)
        object.__setattr__(self, "worst", None if worst is None else worst.value)

    def readers(self) -> list[str]:
        """The readers that ran, in the order of :data:`PROBES`."""
        return [name for name in PROBES if name in self.after]

    def strongest(self) -> str | None:
        """The reader whose pooled reading after erasure lies farthest beyond the floor (ties: listed first)."""
        return max(self.readers(), key=lambda name: rounded_excess(self.after[name]), default=None)

    def worst_value(self) -> ContextValue | None:
        return next((value for value in self.values if value.value == self.worst), None)

    @property
    def neighbour_excess(self) -> float | None:
        """The within-value neighbour share after erasure above its base rate (None: not measured)."""
        if self.nn_share_after is None or self.nn_base_rate is None:
            return None
        return self.nn_share_after - self.nn_base_rate

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> ContextAudit:
        values = {key: value for key, value in data.items() if key != "worst"}
        values["before"], values["after"] = _scores(data["before"]), _scores(data["after"])
        values["values"] = tuple(ContextValue.from_dict(value) for value in data["values"])
        values["skipped"] = tuple(SkippedValue(**skipped) for skipped in data["skipped"])
        return cls(**values)

    def lines(self) -> list[str]:
        """The audit within the context as lines of text (``veil show``, ``veil audit``)."""
        where = "the context" if self.column is None else repr(self.column)
        lines = [
            f"within each value of {where} ({len(self.values)} values, {self.rows} rows; floor {self.floor:.3f}):",
            f"  {FLOOR_MEANING}",
        ]
        for name in self.readers():
            before, after = self.before[name], self.after[name]
            lines.append(
                f"  {PROBE_LABELS[name]}: {before.accuracy:.3f} → {after.with_interval()}, "
                f"beyond the context {after.excess:.3f}"
            )
        if self.nn_share_after is not None and self.nn_share_before is not None:
            lines.append(
                f"  10-NN within the value sharing attribute: {self.nn_share_before:.3f} → {self.nn_share_after:.3f} "
                f"(base {self.nn_base_rate:.3f})"
            )
        worst = self.worst_value()
        if worst is not None:
            readings = ", ".join(f"{PROBE_LABELS[name]} {worst.after[name].accuracy:.3f}" for name in self.readers())
            lines.append(
                f"  worst value {worst.value!r} ({worst.rows} rows, floor {worst.floor:.3f}): {readings}; "
                f"beyond the context {worst.excess:.3f}"
            )
        lines += [f"  skipped {s.value!r} ({s.rows} rows): {s.reason}" for s in self.skipped]
        return lines
