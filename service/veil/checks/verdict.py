"""The status of an audit against the thresholds its version's card records: ``ok``, ``warn`` or ``alert``.

The rule, the same for the audit made at fitting time and for every fresh
audit: each figure of :class:`~veil.checks.thresholds.AuditThresholds` is
compared with its band and reaches a level (``alert`` at or above the band's
alert level, ``warn`` at or above its warn level, else ``ok``).  A figure the
audit has no data for (no task, a continuous attribute) is not judged.

The figures are grouped by threat (:data:`THREATS`: linear readers, nonlinear
readers, neighbours, and the same three within a context), each threat at the
worst level of its figures.  A version claims the threats it is built to
guard (the card's ``claims``, see :mod:`veil.fitting.request`); the headline
status is the worst level of its claimed threats and of the task's cost
(always judged).  Threats not claimed are still measured and shown, as not
claimed, with their status: a linear eraser read by an MLP is what it was
built for, not a failure of it.  A verdict without claims (a card written
before versions claimed threats) is judged on every figure, as it was then.
The live checks use the same three words with their own figures.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import asdict, dataclass, field
from typing import Any

import numpy as np

from veil.audit.context_report import ContextAudit
from veil.audit.group_report import READING_LABELS
from veil.audit.report import PROBE_LABELS, AuditReport, ProbeScore, RegressionScore
from veil.checks.independence import independence_alerts
from veil.checks.thresholds import AuditThresholds

LEVELS = ("ok", "warn", "alert")
RULE = (
    "The rule: each figure is compared with the warn and alert levels the version's card records; each threat "
    "(linear readers, nonlinear readers, neighbours, and these within a context) is at the worst level of its "
    "figures. The status is that of the threats the version claims to guard and of the task's cost: ok when every "
    "figure judged there is below its warn level, warn when any reaches its warn level, and alert when any reaches "
    "its alert level or an independence test for the threat rejects at the Holm-corrected level. Threats not "
    "claimed are measured and shown, not judged. An audit whose raw rows show no "
    "attribute to any probe is at least warn: it proves nothing."
)

#: The rule of a verdict without claims (cards written before versions claimed threats).
RULE_EVERY_FIGURE = (
    "judged on every figure (the card was written before versions claimed the threats they guard): the status is "
    "the worst level any figure reaches"
)

#: Each threat a version can claim to guard: its name as the card and ``veil fit --claim`` spell it, what it is,
#: and the figures that measure it.  Rankings are drawn from the same neighbourhoods, so the neighbours' figure
#: judges them; their own figures (NDKL, MaxSkew) are shown, without levels.
THREATS: dict[str, tuple[str, tuple[str, ...]]] = {
    "linear": ("linear readers", ("linear_gap",)),
    "nonlinear": ("nonlinear readers", ("strongest_gap",)),
    "neighbours": ("neighbours and rankings", ("neighbour_excess",)),
    "context-linear": ("linear readers within the context", ("context_linear_gap",)),
    "context-nonlinear": ("nonlinear readers within the context", ("context_strongest_gap",)),
    "context-neighbours": ("neighbours within the context", ("context_neighbour_excess",)),
}

#: Figures judged whatever a version claims: what erasure costs the task.
ALWAYS_JUDGED = ("task_loss",)

# What each figure says, for the verdict's reasons and the report's explanations.
MEANINGS = {
    "linear_gap": "how far a linear probe on the erased rows reads the attribute beyond the majority baseline "
    "(the lower edge of its 95% interval above that baseline; 0 when the interval reaches it or lies below); "
    "with a group column, the worst of its readings on ordinary folds, on group folds and as a transfer probe",
    "strongest_gap": "the same for the probe farthest from majority of all that ran (linear, quadratic, RBF kernel, "
    "boosted trees, MLP)",
    "neighbour_excess": "how much more often a row's 10 nearest neighbours share its attribute than the base rate "
    "(chance is 0)",
    "task_loss": "task probe accuracy lost to erasure (raw minus erased; 0 is no loss)",
    "context_linear_gap": "within a context: how far a linear probe trained and tested within each value reads the "
    "attribute beyond the floor, what the context alone tells (pooled by rows; the lower edge of its 95% interval "
    "above the floor)",
    "context_strongest_gap": "the same for the probe farthest beyond the floor within the context",
    "context_neighbour_excess": "within a context: how much more often a row's 10 nearest neighbours of the same "
    "value share its attribute than that value's base rate (weighted by rows; chance is 0)",
}


@dataclass(frozen=True)
class ThreatStatus:
    """One threat's level (the worst of its figures), why, and whether any of its figures had data."""

    status: str
    reasons: list[str] = field(default_factory=list)
    measured: bool = True


@dataclass(frozen=True)
class Verdict:
    """One audit's status, the figures it was judged on and, for each figure at warn or alert, why.

    ``claimed`` names the threats the headline judges (with the task's cost); ``threats`` holds every threat's
    own status.  ``claimed`` is None for a verdict judged on every figure (written before claims existed).
    """

    status: str
    figures: dict[str, float | None]
    reasons: list[str] = field(default_factory=list)
    claimed: tuple[str, ...] | None = None
    threats: dict[str, ThreatStatus] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        data: dict[str, Any] = {"status": self.status, "figures": dict(self.figures), "reasons": list(self.reasons)}
        if self.claimed is not None:
            data["claimed"] = list(self.claimed)
            data["threats"] = {name: asdict(threat) for name, threat in self.threats.items()}
        return data

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Verdict:
        claimed = data.get("claimed")
        return cls(
            status=str(data["status"]),
            figures=dict(data["figures"]),
            reasons=list(data.get("reasons", [])),
            claimed=None if claimed is None else tuple(claimed),
            # In the order of THREATS: a card is written with its keys sorted.
            threats={
                name: ThreatStatus(str(entry["status"]), list(entry["reasons"]), bool(entry["measured"]))
                for name in THREATS
                if (entry := data.get("threats", {}).get(name)) is not None
            },
        )

    def sentence(self) -> str:
        """The verdict in one plain sentence: the headline, then the threats measured but not claimed."""
        if self.claimed is None:
            if self.status == "ok":
                judged = sum(value is not None for value in self.figures.values())
                return f"ok: all {judged} judged figures are below their warn levels"
            return f"{self.status}: " + "; ".join(self.reasons)
        if self.status == "ok":
            claimed = ", ".join(THREATS[name][0] for name in self.claimed) or "no threat"
            text = f"ok: every figure of the claimed threats ({claimed}) and of the task is below its warn level"
        else:
            text = f"{self.status}: " + "; ".join(self.reasons)
        unmeasured = [THREATS[name][0] for name in self.claimed if not self.threats[name].measured]
        # A verdict judged since unmeasured claims count as warn says so among its reasons already.
        if unmeasured and not any(reason.startswith(NOT_MEASURED.split(":")[0]) for reason in self.reasons):
            text += "; claimed but not measured: " + ", ".join(unmeasured)
        others = [
            f"{THREATS[name][0]} {threat.status}" for name, threat in self.threats.items() if self.unclaimed(name)
        ]
        return text + ("" if not others else "; not claimed: " + ", ".join(others))

    def unclaimed(self, threat: str) -> bool:
        """Whether ``threat`` was measured but is not one the version claims (shown, not judged)."""
        return self.claimed is not None and threat not in self.claimed and self.threats[threat].measured

    def threat_lines(self) -> list[str]:
        """One line per threat measured or claimed: its name, whether it is claimed, its status and why."""
        if self.claimed is None:
            return [f"rule: {RULE_EVERY_FIGURE}"]
        shown = [name for name, threat in self.threats.items() if name in self.claimed or threat.measured]
        width = max((len(THREATS[name][0]) for name in shown), default=0)
        lines = []
        for name in shown:
            threat = self.threats[name]
            state = "claimed" if name in self.claimed else "not claimed"
            level = threat.status if threat.measured else "not measured (no probe or rows of the audit read it)"
            why = "" if not threat.reasons else ": " + "; ".join(threat.reasons)
            lines.append(f"{THREATS[name][0]:{width}}  {state}: {level}{why}")
        return lines


def _edge_gap(score: ProbeScore | RegressionScore) -> float:
    """How far the probe reads beyond chance: :attr:`ProbeScore.excess` (one-sided, above majority).

    For a continuous attribute, the lower edge of the probe's R² interval above 0 (the mean predictor's R²).
    """
    if isinstance(score, RegressionScore):
        return max(0.0, score.r2_low if score.r2_low is not None else score.r2)
    return score.excess


def _widest(report: AuditReport) -> tuple[str, float] | None:
    """The probe whose reading after erasure lies farthest beyond majority, and that distance (None: no probe)."""
    gaps = [(name, _edge_gap(after)) for name, _, after in report.leakage.probes()]
    # Ties go to the probe listed first, so round-off in a tie cannot change the name reported.
    return max(gaps, key=lambda item: item[1], default=None)


def linear_reading(report: AuditReport) -> tuple[str | None, ProbeScore | RegressionScore]:
    """The linear probe's reading the linear threat is judged on, and which reading it is.

    Without a group column (every audit stored before group folds), the linear probe after erasure, as ever
    (``None`` names it).  With one, the worst of its readings on ordinary folds, on group folds and as a
    transfer probe (:meth:`~veil.audit.group_report.GroupAudit.worst_linear`).
    """
    if report.groups is None:
        return None, report.leakage.linear_after
    return report.groups.worst_linear()


def audit_figures(report: AuditReport) -> dict[str, float | None]:
    """The figures a verdict judges, from an audit (None where the audit has no data for one)."""
    linear = linear_reading(report)[1]
    widest = _widest(report)
    retrieval = report.retrieval
    utility = report.utility
    task_loss = None
    if utility.task_accuracy_before is not None and utility.task_accuracy_after is not None:
        task_loss = utility.task_accuracy_before - utility.task_accuracy_after
    return {
        "linear_gap": _edge_gap(linear),
        "strongest_gap": None if widest is None else widest[1],
        "neighbour_excess": None
        if retrieval is None
        else retrieval.attribute_share_after - retrieval.attribute_base_rate,
        "task_loss": task_loss,
        **context_figures(report.context),
    }


def context_figures(context: ContextAudit | None) -> dict[str, float | None]:
    """The figures within a context a verdict judges (None without a context, or with no value read).

    The same one-sided rule as the population's probes (:attr:`ProbeScore.excess`), the floor in place of majority.
    """
    linear = strongest = None
    if context is not None and context.after:
        linear = context.after["linear"].excess
        strongest = max(score.excess for score in context.after.values())
    return {
        "context_linear_gap": linear,
        "context_strongest_gap": strongest,
        "context_neighbour_excess": None if context is None else context.neighbour_excess,
    }


def judge_audit(report: AuditReport, thresholds: AuditThresholds, claims: tuple[str, ...] | None = None) -> Verdict:
    """The status of ``report`` under ``thresholds``, with a reason for each figure at warn or alert.

    ``claims`` names the threats (:data:`THREATS`) the headline judges, with the task's cost; every threat is
    measured and given its own status all the same.  None judges every figure (the rule before claims).
    """
    figures = audit_figures(report)
    bands = {name: getattr(thresholds, name) for name in figures}
    widest = _widest(report)
    reading = linear_reading(report)[0]
    labels = {
        "linear_gap": "the linear probe" + ("" if reading is None else f" ({READING_LABELS[reading]})"),
        "strongest_gap": "the strongest probe" + ("" if widest is None else f" ({PROBE_LABELS[widest[0]]})"),
        "neighbour_excess": "the 10-NN attribute share",
        "task_loss": "the task probe",
        "context_linear_gap": "within the context, the linear probe",
        "context_strongest_gap": "within the context, the strongest probe" + _context_strongest(report),
        "context_neighbour_excess": "within the context, the 10-NN attribute share",
    }
    reads = (
        "explains at least {value:.3f} of the attribute's variance (R²)"
        if isinstance(report.leakage.linear_after, RegressionScore)
        else "reads the attribute {value:.3f} beyond majority"
    )
    what = {
        "linear_gap": reads,
        "strongest_gap": reads,
        "neighbour_excess": "lies {value:.3f} above its base rate",
        "task_loss": "lost {value:.3f} of accuracy",
        "context_linear_gap": "reads the attribute {value:.3f} beyond the floor",
        "context_strongest_gap": "reads the attribute {value:.3f} beyond the floor",
        "context_neighbour_excess": "lies {value:.3f} above its base rate",
    }
    levels: dict[str, str] = {}
    why: dict[str, list[str]] = {}
    for name, value in figures.items():
        levels[name] = bands[name].level(value)
        why[name] = []
        if levels[name] != "ok" and value is not None:
            band = bands[name]
            level = levels[name]
            why[name].append(f"{labels[name]} {what[name].format(value=value)} ({level} at {getattr(band, level):g})")
    measured = _measured(report, figures)
    threats = {
        threat: ThreatStatus(
            worst(levels[name] for name in names) if measured[threat] else "ok",
            [reason for name in names for reason in why[name]] if measured[threat] else [],
            measured=measured[threat],
        )
        for threat, (_, names) in THREATS.items()
    }
    # A test rejecting independence at the corrected level is an alert for the threat it measures.
    tested = independence_alerts(report)
    for threat, alerts in tested.items():
        before = threats[threat]
        threats[threat] = ThreatStatus("alert", [*before.reasons, *alerts], measured=True)
        measured[threat] = True
    if claims is None:
        judged = list(figures)
    else:
        # A claimed threat the audit did not measure judges nothing; the verdict's lines say it was not measured.
        claims = check_claims(claims)
        judged = [name for claim in claims if measured[claim] for name in THREATS[claim][1]] + list(ALWAYS_JUDGED)
    status = worst(levels[name] for name in judged)
    reasons = [reason for name in figures if name in judged for reason in why[name]]
    for threat, alerts in tested.items():
        if claims is None or threat in claims:
            status = "alert"
            reasons += alerts
    unmeasured = [] if claims is None else [claim for claim in claims if not measured[claim]]
    if unmeasured:
        # A claim the audit could not check is not a pass (a sample without the context column, every value skipped).
        reasons.append(NOT_MEASURED.format(threats=", ".join(THREATS[claim][0] for claim in unmeasured)))
        status = max(status, "warn", key=LEVELS.index)
    if _unreadable_before(report):
        # Nothing to erase was seen, so nothing was shown erased: wrong labels or too small a sample look like this.
        reasons.append(UNREADABLE)
        status = max(status, "warn", key=LEVELS.index)
    return Verdict(status=status, figures=figures, reasons=reasons, claimed=claims, threats=threats)


def _measured(report: AuditReport, figures: dict[str, float | None]) -> dict[str, bool]:
    """Whether the audit measured each threat: data for its figures, and for the nonlinear ones a nonlinear probe.

    With the linear probe only (``--probes linear``) the strongest probe is the linear one: that measures no
    nonlinear reader.
    """
    nonlinear = any(name != "linear" for name, _, _ in report.leakage.probes())
    within = report.context is not None and any(name != "linear" for name in report.context.after)
    ran = {"nonlinear": nonlinear, "context-nonlinear": within}
    return {
        threat: ran.get(threat, True) and any(figures[name] is not None for name in names)
        for threat, (_, names) in THREATS.items()
    }


def worst(levels: Iterable[str]) -> str:
    """The worst of some levels (``ok`` for none)."""
    return max(levels, key=LEVELS.index, default="ok")


def check_claims(claims: Iterable[str]) -> tuple[str, ...]:
    """``claims`` as a tuple in :data:`THREATS`' order; ``ValueError`` naming an unknown one."""
    given = list(claims)
    unknown = [claim for claim in given if claim not in THREATS]
    if unknown:
        raise ValueError(f"unknown threat {unknown[0]!r}; known: {', '.join(THREATS)}")
    return tuple(name for name in THREATS if name in given)


def _context_strongest(report: AuditReport) -> str:
    """`` (the probe's name)`` of the strongest probe within the context, or nothing."""
    name = None if report.context is None else report.context.strongest()
    return "" if name is None else f" ({PROBE_LABELS[name]})"


#: The reason a verdict gives when a threat the version claims was not measured.
NOT_MEASURED = "claimed but not measured by this audit: {threats} (this is not a pass)"

#: The reason a verdict gives when no probe read the attribute before erasure either.
UNREADABLE = (
    "no probe reads the attribute before erasure either, so this audit cannot show that erasure works (check "
    "the labels and the sample's size; this is not a pass)"
)


def _unreadable_before(report: AuditReport) -> bool:
    """Whether every probe that ran read nothing beyond chance before erasure (the raw rows)."""
    before = [_edge_gap(raw) for _, raw, _ in report.leakage.probes()]
    # The figures are shares and R² (at most 1): a few float64 ulps above 0 are round-off, not a reading.
    return bool(before) and max(before) <= ROUND_OFF


#: What a figure of at most 1 may carry of round-off: a few float64 epsilons.
ROUND_OFF = 8 * float(np.finfo(np.float64).eps)
