"""Readers across groups, as records: ordinary folds, group folds and the transfer reader, side by side.

When rows share a group (an author, an account, a first name, a site) the
same group can recur across the folds of a reader's cross-validation.  A
reader then learns the group, and the group tells the attribute: the
ordinary folds read the attribute where a model facing new people would
not.  Three readings of the standardised linear reader answer different
questions:

- **ordinary folds**: stratified folds over the audited rows, groups mixed
  across folds (what the audit reads without a group column);
- **group folds**: each group in one fold, so every row is read by a reader
  that never saw its group: would the reading hold for people the fit never saw;
- **transfer**: trained on the cleaned fitting rows, tested on the cleaned
  audited rows (whole groups apart when the split kept groups apart): what a
  model trained on the data the eraser saw reads on new people.

The verdict judges the worst of the three for the linear threat
(:mod:`veil.checks.verdict`).  Plain data (no scikit-learn), so cards and
reports can read it; the measuring is in :mod:`veil.audit.groups`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from veil.audit.context_report import rounded_excess
from veil.audit.scores import PROBE_LABELS, ProbeScore

#: What each reading means, in one sentence each (the report, ``veil show`` and the docs print them).
READING_MEANINGS = {
    "ordinary": "stratified folds over the audited rows: the same group recurs across folds, so a reader can learn "
    "the group rather than the attribute and over-read",
    "grouped": "each group kept in one fold: every row is read by a reader that never saw its group, which answers "
    "whether the reading would hold for people the fit never saw",
    "transfer": "trained on the cleaned fitting rows and tested on the cleaned audited rows: what a model trained "
    "on the data the eraser saw reads on the rows it was judged on",
}
READING_LABELS = {"ordinary": "ordinary folds", "grouped": "group folds", "transfer": "transfer"}

#: What an audit without a group column says (versions stored before, and fits without ``--group``).
NO_GROUP_FOLDS = "no group folds were used: the audit was not given a group column"


@dataclass(frozen=True)
class GroupAudit:
    """The linear reader read three ways across the groups of the audited rows, and the transfer reader.

    Attributes
    ----------
    column : str or None
        The group column's name.
    groups : int
        Groups among the audited rows.
    folds, ordinary_folds : int
        Group folds and ordinary (stratified) folds used.
    ordinary_before, ordinary_after : ProbeScore
        The linear reader on ordinary folds, raw and cleaned rows.
    grouped_before, grouped_after : ProbeScore
        The linear reader on group folds (the population's linear figures of the report, repeated so that the
        section reads alone).
    transfer_before, transfer_after : ProbeScore or None
        The linear reader trained on the (raw, cleaned) fitting rows and tested on the (raw, cleaned) audited
        rows; None where no fitting rows were at hand (a fresh audit).
    transfer_reader : str or None
        The nonlinear reader strongest on group folds, also read as a transfer reader (None: linear only).
    transfer_reader_before, transfer_reader_after : ProbeScore or None
    fit_groups : int or None
        Groups among the fitting rows the transfer reader learnt from.
    shared_groups : int or None
        Groups with rows on both sides (0: the split kept groups apart).
    note : str or None
        Why the transfer reader was not read, when it was not.
    """

    column: str | None
    groups: int
    folds: int
    ordinary_folds: int
    ordinary_before: ProbeScore
    ordinary_after: ProbeScore
    grouped_before: ProbeScore
    grouped_after: ProbeScore
    transfer_before: ProbeScore | None = None
    transfer_after: ProbeScore | None = None
    transfer_reader: str | None = None
    transfer_reader_before: ProbeScore | None = None
    transfer_reader_after: ProbeScore | None = None
    fit_groups: int | None = None
    shared_groups: int | None = None
    note: str | None = None

    def linear_readings(self) -> list[tuple[str, ProbeScore, ProbeScore | None]]:
        """``(reading, after, before)`` of each reading of the linear reader that was made, in table order."""
        readings: list[tuple[str, ProbeScore, ProbeScore | None]] = [
            ("ordinary", self.ordinary_after, self.ordinary_before),
            ("grouped", self.grouped_after, self.grouped_before),
        ]
        if self.transfer_after is not None:
            readings.append(("transfer", self.transfer_after, self.transfer_before))
        return readings

    def worst_linear(self) -> tuple[str, ProbeScore]:
        """The reading of the linear reader farthest beyond majority after erasure (ties: the first listed).

        Compared at 9 decimals (:func:`~veil.audit.context_report.rounded_excess`), so round-off never picks it.
        """
        name, after, _ = max(self.linear_readings(), key=lambda item: rounded_excess(item[1]))
        return name, after

    def rows(self) -> list[tuple[str, str, str, str, str]]:
        """``(reading, before, after, majority, meaning)`` for a table: the linear reader's three, then the
        nonlinear transfer reader's."""
        rows = []
        for name, after, before in self.linear_readings():
            label = f"linear, {READING_LABELS[name]}"
            rows.append(
                (label, "" if before is None else before.with_interval(), after.with_interval(),
                 f"{after.majority:.3f}", READING_MEANINGS[name])
            )  # fmt: skip
        if self.transfer_reader is not None and self.transfer_reader_after is not None:
            before = self.transfer_reader_before
            rows.append(
                (f"{PROBE_LABELS[self.transfer_reader]}, transfer",
                 "" if before is None else before.with_interval(), self.transfer_reader_after.with_interval(),
                 f"{self.transfer_reader_after.majority:.3f}",
                 "the nonlinear reader strongest on group folds, trained and tested as the transfer reader")
            )  # fmt: skip
        return rows

    def headline(self) -> str:
        """The linear probe after erasure read three ways, in one line, and the reading the verdict judges."""
        readings = ", ".join(
            f"{READING_LABELS[name]} {after.accuracy:.3f}" for name, after, _ in self.linear_readings()
        )
        name, after = self.worst_linear()
        column = "" if self.column is None else f" by {self.column!r}"
        return (
            f"linear probe after: {readings} (majority {after.majority:.3f}; {self.groups} groups{column}); "
            f"judged on {READING_LABELS[name]}"
        )

    def describe(self) -> str:
        """One sentence on the groups: how many, how many folds, and whether the split kept them apart."""
        column = "the group column" if self.column is None else f"group column {self.column!r}"
        text = (
            f"{column}: {self.groups} groups among the audited rows, {self.folds} group folds "
            f"({self.ordinary_folds} ordinary)"
        )
        if self.fit_groups is not None:
            text += f"; the transfer reader learnt from {self.fit_groups} groups of fitting rows"
        if self.shared_groups is not None:
            text += (
                "; no group has rows on both sides of the split"
                if self.shared_groups == 0
                else f"; {self.shared_groups} groups have rows on both sides of the split"
            )
        return text

    def lines(self) -> list[str]:
        """The section as plain text: the sentence, the table, what each reading means, and the worst."""
        rows = self.rows()
        width = max(len(row[0]) for row in rows)
        column = max(21, *(len(text) for row in rows for text in row[1:3]))
        lines = [f"across groups, {self.describe()}"]
        lines.append(f"  {'':{width}}  {'before':>{column}}  {'after':>{column}}  majority")
        lines += [f"  {row[0]:{width}}  {row[1]:>{column}}  {row[2]:>{column}}  {row[3]}" for row in rows]
        lines += [f"  {READING_LABELS[name]}: {READING_MEANINGS[name]}" for name, _, _ in self.linear_readings()]
        if self.note is not None:
            lines.append(f"  {self.note}")
        name, after = self.worst_linear()
        lines.append(
            f"  the verdict judges the linear threat on the worst of these: {READING_LABELS[name]}, "
            f"{after.with_interval()} (majority {after.majority:.3f})"
        )
        return lines

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> GroupAudit:
        values: dict[str, Any] = dict(data)
        for key, value in data.items():
            if isinstance(value, dict):
                values[key] = ProbeScore.from_dict(value)
        return cls(**values)
