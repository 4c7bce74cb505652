"""The typed audit report: what an auditor reads, serialisable to and from JSON."""

from __future__ import annotations

import json
from collections.abc import Iterator
from dataclasses import asdict, dataclass, field
from typing import Any

from veil.audit.context_report import ContextAudit
from veil.audit.glossary import MEANINGS, PROBE_MODELS, REGRESSION_MODELS
from veil.audit.group_report import GroupAudit
from veil.audit.independence_report import NOT_RUN, IndependenceAudit
from veil.audit.rows_curve import RowsNeeded, rows_needed_lines
from veil.audit.scores import PROBE_LABELS, PROBES, ProbeScore

__all__ = [
    "FRESH_KFOLD", "HELD_OUT_KFOLD", "PROBES", "PROBE_LABELS", "RANKING_KEYS", "AuditReport", "ContextAudit",
    "FigureRow", "Leakage", "ProbeProtocol", "ProbeScore", "RankingFairness", "RegressionScore", "Retrieval",
    "Utility",
]  # fmt: skip

#: The keys of :meth:`RankingFairness.rows`, in order.
RANKING_KEYS = ("ranking_share", "ranking_exposure", "max_skew", "absent_class", "ndkl")
#: The protocol :func:`veil.audit.audit` follows.
HELD_OUT_KFOLD = "k-fold cross-validation within held-out rows"
FRESH_KFOLD = "k-fold cross-validation within a fresh sample"


@dataclass(frozen=True)
class FigureRow:
    """One figure of an audit, as a table shows it: what it is, its values, what it means and its chance level.

    ``key`` names the kind of figure (see :mod:`veil.audit.glossary`); ``chance`` is
    what the figure reads when erasure leaves nothing to read (or the value
    that means "unchanged"), as text; ``group`` gathers related rows (one
    probe's, the costs, the neighbours, the rankings).
    """

    key: str
    label: str
    before: str
    after: str
    meaning: str
    chance: str
    group: str


@dataclass(frozen=True)
class RegressionScore:
    """Held-out figures of a regression probe predicting a continuous attribute (R² 0: no trace it can read).

    Every row is predicted by a probe fitted on the other folds.  ``mae`` is
    the mean absolute error and ``mae_baseline`` that of the mean predictor
    (each fold's training mean) on the same folds; the intervals are 95%
    percentile intervals of a bootstrap over the held-out rows.  Cards
    written before these figures hold ``r2`` and ``n`` only.
    """

    r2: float
    n: int
    r2_low: float | None = None
    r2_high: float | None = None
    mae: float | None = None
    mae_low: float | None = None
    mae_high: float | None = None
    mae_baseline: float | None = None

    def with_interval(self) -> str:
        """``R² [low, high]`` to three decimals (without an interval for an older card)."""
        if self.r2_low is None or self.r2_high is None:
            return f"{self.r2:.3f}"
        return f"{self.r2:.3f} [{self.r2_low:.3f}, {self.r2_high:.3f}]"


@dataclass(frozen=True)
class Leakage:
    """How much of the attribute each probe recovers before and after erasure.

    ``nonlinear_*`` hold the MLP probe (the name predates the other nonlinear
    probes); the quadratic, kernel and trees probes are absent from cards
    written before them.  ``strongest`` is derived, never given: the probe
    with the most held-out rows right after erasure (ties go to the probe
    listed first in :data:`PROBES`), or None for a continuous attribute.
    """

    linear_before: ProbeScore | RegressionScore
    linear_after: ProbeScore | RegressionScore
    nonlinear_before: ProbeScore | None
    nonlinear_after: ProbeScore | None
    guardedness_gap_before: float | None
    guardedness_gap_after: float | None
    guardedness_noise_floor: float | None = None
    quadratic_before: ProbeScore | None = None
    quadratic_after: ProbeScore | None = None
    kernel_before: ProbeScore | None = None
    kernel_after: ProbeScore | None = None
    # For a continuous attribute, boosted regression trees.
    trees_before: ProbeScore | RegressionScore | None = None
    trees_after: ProbeScore | RegressionScore | None = None
    strongest: str | None = field(init=False)

    def __post_init__(self) -> None:
        # Counts, not accuracies, are compared, so round-off cannot decide the rank.
        scored = [(name, after) for name, _, after in self.probes() if isinstance(after, ProbeScore)]
        best = max(scored, key=lambda item: item[1].hits, default=None)
        object.__setattr__(self, "strongest", None if best is None else best[0])

    def probes(self) -> Iterator[tuple[str, ProbeScore | RegressionScore, ProbeScore | RegressionScore]]:
        """``(name, before, after)`` of each probe that ran, in the order of :data:`PROBES`."""
        for name in PROBES:
            before, after = self.scores(name)
            if before is not None and after is not None:
                yield name, before, after

    def scores(self, name: str) -> tuple[ProbeScore | RegressionScore | None, ProbeScore | RegressionScore | None]:
        """The ``(before, after)`` scores of probe ``name`` (None where it did not run)."""
        field_name = {"mlp": "nonlinear"}.get(name, name)
        before: ProbeScore | RegressionScore | None = getattr(self, f"{field_name}_before")
        after: ProbeScore | RegressionScore | None = getattr(self, f"{field_name}_after")
        return before, after

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Leakage:
        values = {key: value for key, value in data.items() if key != "strongest"}
        for key, value in values.items():
            if isinstance(value, dict):
                values[key] = RegressionScore(**value) if "r2" in value else ProbeScore.from_dict(value)
        return cls(**values)


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
class RankingFairness:
    """Ranking-fairness figures with the held-out rows as queries and as corpus (cosine, each query's own row left out).

    Each figure is a mean over the queries of one query's top ``k``, before
    and after erasure on the same queries (see :mod:`veil.audit.ranking`):
    the share of each class among the results against the corpus's base
    rate, the share of DCG-discounted exposure, MaxSkew@k, the share of
    queries whose top ``k`` lacks a class (MinSkew@k = −∞), and NDKL.
    Per-class tuples follow the report's ``classes``.
    """

    k: int
    queries: int
    base_rate: tuple[float, ...]
    share_before: tuple[float, ...]
    share_after: tuple[float, ...]
    exposure_share_before: tuple[float, ...]
    exposure_share_after: tuple[float, ...]
    max_skew_before: float
    max_skew_after: float
    absent_class_share_before: float
    absent_class_share_after: float
    ndkl_before: float
    ndkl_after: float

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> RankingFairness:
        values: dict[str, Any] = {key: tuple(v) if isinstance(v, list) else v for key, v in data.items()}
        return cls(**values)

    def rows(self, classes: tuple[str, ...] | None) -> list[tuple[str, str, str]]:
        """``(label, before, after)`` rows for a table."""
        names = " / ".join(classes) if classes else "by class"
        k = self.k
        before, after = _shares(self.exposure_share_before), _shares(self.exposure_share_after)
        return [
            (f"top-{k} share {names} (base {_shares(self.base_rate)})", _shares(self.share_before),
             _shares(self.share_after)),
            (f"top-{k} exposure share {names}", before, after),
            (f"MaxSkew@{k}", f"{self.max_skew_before:.3f}", f"{self.max_skew_after:.3f}"),
            (f"queries missing a class in top {k}", f"{self.absent_class_share_before:.3f}",
             f"{self.absent_class_share_after:.3f}"),
            (f"NDKL@{k}", f"{self.ndkl_before:.4f}", f"{self.ndkl_after:.4f}"),
        ]  # fmt: skip

    def chance_levels(self) -> list[str]:
        """What each of :meth:`rows` reads when results ignore the attribute, in the same order."""
        base = f"base rates {_shares(self.base_rate)}"
        exact = "0 at exactly the base rates; above 0 by chance"
        return [base, base, exact, f"{_absent_by_chance(self.base_rate, self.k):.3f} by chance", exact]


def _absent_by_chance(base_rate: tuple[float, ...], k: int) -> float:
    """The chance that ``k`` results drawn at the base rates miss some class (inclusion-exclusion over classes)."""
    base_rate = tuple(p for p in base_rate if p > 0)  # a class with no row here cannot be missed by chance
    classes = len(base_rate)
    if classes > 12:  # 4096 subsets at most; beyond, the union bound (an upper bound) is close enough to read
        return min(1.0, sum((1 - p) ** k for p in base_rate))
    total = 0.0
    for subset in range(1, 1 << classes):
        members = [base_rate[c] for c in range(classes) if subset >> c & 1]
        total += (-1) ** (len(members) + 1) * max(0.0, 1 - sum(members)) ** k
    return total


def _mae(score: RegressionScore) -> str:
    """The mean absolute error with its interval, against the mean predictor's."""
    return f"{score.mae:.3f} [{score.mae_low:.3f}, {score.mae_high:.3f}] (mean predictor {score.mae_baseline:.3f})"


def _shares(values: tuple[float, ...]) -> str:
    return " / ".join(f"{value:.3f}" for value in values)


@dataclass(frozen=True)
class ProbeProtocol:
    """How the probes were trained and tested.

    Attributes
    ----------
    scheme : str
        :data:`HELD_OUT_KFOLD`: every probe is trained and tested only on
        held-out rows, which the eraser never saw, each row predicted by a
        probe trained on the other folds.  :data:`FRESH_KFOLD`: the same
        within a fresh sample audited after the version was stored.
    folds : int
        Folds of the cross-validation (stratified by the attribute's class).
    seed : int
        Seeds the folds and the probes.
    eraser_rows : int
        Rows the eraser was fitted on (none of them reaches a probe).
    """

    scheme: str
    folds: int
    seed: int
    eraser_rows: int

    def describe(self, heldout_rows: int) -> str:
        if self.scheme == FRESH_KFOLD:
            return (
                f"trained and tested only on the {heldout_rows} rows of a fresh sample (the eraser was fitted on "
                f"{self.eraser_rows} rows of its own): {self.folds}-fold cross-validation, seed {self.seed}"
            )
        return (
            f"trained and tested only on the {heldout_rows} held-out rows the eraser never saw "
            f"(it was fitted on {self.eraser_rows} others): {self.folds}-fold cross-validation, seed {self.seed}"
        )


@dataclass(frozen=True)
class AuditReport:
    """The audit of one eraser on held-out data.

    ``classes`` names the attribute's classes in the order of each probe's
    ``recall``; ``protocol`` says how the probes were scored; ``ranking``
    holds the ranking-fairness figures.  Each is None in cards written before
    it was recorded (``ranking`` also for a continuous attribute).
    ``context`` holds every reader within each value of a context, when the
    audited rows carried one (see :mod:`veil.audit.context_report`).
    ``groups`` holds the linear reader on ordinary folds, on group folds and
    as a transfer reader, when the audited rows carried a group column (the
    probes' folds then keep each group in one fold; see
    :mod:`veil.audit.group_report`); None means no group folds were used.
    ``independence`` holds the independence tests of the erased rows against a
    categorical attribute (see :mod:`veil.audit.independence_report`); None in
    audits made before them, or of a continuous attribute.
    """

    method: str
    rank: int
    n_heldout: int
    dim: int
    leakage: Leakage
    utility: Utility
    retrieval: Retrieval | None
    notes: list[str] = field(default_factory=list)
    classes: tuple[str, ...] | None = None
    protocol: ProbeProtocol | None = None
    ranking: RankingFairness | None = None
    context: ContextAudit | None = None
    groups: GroupAudit | None = None
    #: The held-out linear leakage against the fitting rows and the rows it projects (see
    #: :mod:`veil.audit.rows_curve`); None where it was not measured (an audit of a stored map, an older card).
    rows_needed: RowsNeeded | None = None
    independence: IndependenceAudit | None = None

    @property
    def balanced_chance(self) -> float | None:
        """The balanced accuracy of a probe that cannot tell the classes apart: ``1 / classes``."""
        return None if not self.classes else 1 / len(self.classes)

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    def to_json(self, **kwargs: Any) -> str:
        return json.dumps(self.to_dict(), **kwargs)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> AuditReport:
        retrieval = data.get("retrieval")
        classes = data.get("classes")
        protocol = data.get("protocol")
        ranking = data.get("ranking")
        context = data.get("context")
        groups = data.get("groups")
        rows_needed = data.get("rows_needed")
        independence = data.get("independence")
        return cls(
            method=data["method"],
            rank=data["rank"],
            n_heldout=data["n_heldout"],
            dim=data["dim"],
            leakage=Leakage.from_dict(data["leakage"]),
            utility=Utility(**data["utility"]),
            retrieval=None if retrieval is None else Retrieval(**retrieval),
            notes=list(data.get("notes", [])),
            classes=None if classes is None else tuple(classes),
            protocol=None if protocol is None else ProbeProtocol(**protocol),
            ranking=None if ranking is None else RankingFairness.from_dict(ranking),
            context=None if context is None else ContextAudit.from_dict(context),
            groups=None if groups is None else GroupAudit.from_dict(groups),
            rows_needed=None if rows_needed is None else RowsNeeded.from_dict(rows_needed),
            independence=None if independence is None else IndependenceAudit.from_dict(independence),
        )

    @classmethod
    def from_json(cls, text: str) -> AuditReport:
        return cls.from_dict(json.loads(text))

    def figure_rows(self) -> list[FigureRow]:
        """Every figure of the audit before and after erasure, with what it means and its chance level."""
        rows: list[FigureRow] = []
        chance = self.balanced_chance
        balanced = "balanced accuracy" + ("" if chance is None else f" (chance {chance:.3f})")
        lk = self.leakage
        majority = lk.linear_before.majority if isinstance(lk.linear_before, ProbeScore) else None

        group = "baseline"

        def row(key: str, label: str, before: str, after: str, level: str, model: str = "") -> None:
            rows.append(FigureRow(key, label, before, after, MEANINGS[key].format(model=model), level, group))

        def probe(name: str, before: object, after: object) -> None:
            label, model = PROBE_LABELS[name], PROBE_MODELS[name]
            if isinstance(before, ProbeScore) and isinstance(after, ProbeScore):
                level = f"majority {after.majority:.3f}"
                row("accuracy", f"{label} accuracy", before.with_interval(), after.with_interval(), level, model)
                row(
                    "balanced", f"{label} {balanced}", f"{before.balanced_accuracy:.3f}",
                    f"{after.balanced_accuracy:.3f}", "" if chance is None else f"{chance:.3f}",
                )  # fmt: skip
                if self.classes and before.recall is not None and after.recall is not None:
                    row(
                        "recall", f"{label} recall {' / '.join(self.classes)}", _recall(before), _recall(after),
                        "" if chance is None else f"{chance:.3f} on average",
                    )  # fmt: skip
                row("gap", f"{label} |accuracy - majority|", f"{before.gap:.3f}", f"{after.gap:.3f}", "0")
            elif isinstance(before, RegressionScore) and isinstance(after, RegressionScore):
                model = REGRESSION_MODELS.get(name, model)
                row("r2", f"{label} R²", before.with_interval(), after.with_interval(), "0", model)
                if before.mae is not None and after.mae is not None:
                    row("mae", f"{label} mean absolute error", _mae(before), _mae(after), "the mean predictor's", model)

        if majority is not None:
            row("majority", "majority baseline", f"{majority:.3f}", f"{majority:.3f}", f"{majority:.3f}")
        for name, before, after in lk.probes():
            group = PROBE_LABELS[name]
            probe(name, before, after)
        group = "linear guardedness"
        if lk.guardedness_gap_before is not None and lk.guardedness_gap_after is not None:
            noise = lk.guardedness_noise_floor
            floor = "" if noise is None else f" (noise {noise:.2f})"
            row(
                "class_mean_gap", "max whitened class-mean gap" + floor, f"{lk.guardedness_gap_before:.3f}",
                f"{lk.guardedness_gap_after:.3f}", "" if noise is None else f"noise {noise:.2f}",
            )  # fmt: skip
        ut = self.utility
        group = "what erasure costs"
        row("distortion", "relative squared distortion", "0", f"{ut.relative_distortion:.4f}", "0 is unchanged")
        row("cosine", "mean cosine(x, x')", "1", f"{ut.mean_cosine:.4f}", "1 is unchanged")
        row("knn_overlap", "10-NN overlap with raw", "1", f"{ut.knn_overlap_at_10:.3f}", "1 is unchanged")
        if ut.task_accuracy_before is not None and ut.task_accuracy_after is not None:
            row(
                "task", "task probe accuracy", f"{ut.task_accuracy_before:.3f}", f"{ut.task_accuracy_after:.3f}",
                "keep it near its raw value",
            )  # fmt: skip
        if ut.tpr_gap_rms_before is not None and ut.tpr_gap_rms_after is not None:
            row("tpr_gap", "task TPR gap (RMS)", f"{ut.tpr_gap_rms_before:.3f}", f"{ut.tpr_gap_rms_after:.3f}", "0")
        if self.retrieval is not None:
            rt = self.retrieval
            group = "nearest neighbours"
            row(
                "nn_attribute", f"10-NN sharing attribute (base {rt.attribute_base_rate:.3f})",
                f"{rt.attribute_share_before:.3f}", f"{rt.attribute_share_after:.3f}",
                f"base rate {rt.attribute_base_rate:.3f}",
            )  # fmt: skip
            if rt.task_share_before is not None and rt.task_share_after is not None and rt.task_base_rate is not None:
                row(
                    "nn_task", f"10-NN sharing task (base {rt.task_base_rate:.3f})", f"{rt.task_share_before:.3f}",
                    f"{rt.task_share_after:.3f}", f"base rate {rt.task_base_rate:.3f}",
                )  # fmt: skip
        if self.ranking is not None:
            group = "rankings"
            for key, (label, before_text, after_text), level in zip(
                RANKING_KEYS, self.ranking.rows(self.classes), self.ranking.chance_levels(), strict=True
            ):
                row(key, label, before_text, after_text, level)
        return rows

    def format_table(self) -> str:
        """A plain-text before/after table for terminals and READMEs."""
        rows = [(row.label, row.before, row.after) for row in self.figure_rows()]
        width = max(len(r[0]) for r in rows)
        column = max(21, *(len(text) for row in rows for text in row[1:]))
        fresh = self.protocol is not None and self.protocol.scheme == FRESH_KFOLD
        lines = [
            f"{self.method} eraser, rank {self.rank}, "
            f"audited on {self.n_heldout} {'rows of a fresh sample' if fresh else 'held-out rows'} "
            f"of dimension {self.dim}",
        ]
        if self.protocol is not None:
            lines.append("probes " + self.protocol.describe(self.n_heldout))
        strongest = self.strongest_after()
        if strongest is not None:
            lines.append(f"strongest probe after erasure: {strongest}")
        lines.append(f"{'':{width}}  {'before':>{column}}  {'after':>{column}}")
        lines += [f"{name:{width}}  {b:>{column}}  {a:>{column}}" for name, b, a in rows]
        if self.context is not None:
            lines += self.context.lines()
        if self.groups is not None:
            lines += self.groups.lines()
        if self.rows_needed is not None:
            lines += rows_needed_lines(self.rows_needed)
        if self.independence is not None:
            lines += self.independence.lines()
        elif self.classes:
            lines.append(NOT_RUN)
        lines += [f"note: {n}" for n in self.notes]
        return "\n".join(lines)

    def strongest_after(self) -> str | None:
        """The strongest probe after erasure with its figures; None unless two or more classification probes ran."""
        name = self.leakage.strongest
        if name is None or sum(1 for _ in self.leakage.probes()) < 2:
            return None
        after = self.leakage.scores(name)[1]
        if not isinstance(after, ProbeScore):
            return None
        chance = self.balanced_chance
        balanced = f"balanced {after.balanced_accuracy:.3f}" + ("" if chance is None else f" (chance {chance:.3f})")
        return f"{PROBE_LABELS[name]}, {after.with_interval()} (majority {after.majority:.3f}), {balanced}"


def _recall(score: ProbeScore) -> str:
    return " / ".join(f"{value:.3f}" for value in score.recall or ())
