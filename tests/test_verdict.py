"""The verdict rule on audits worked by hand: each figure against its band, the worst level wins."""

from __future__ import annotations

import dataclasses
import json

import pytest

from veil.audit.context_report import ContextAudit
from veil.audit.report import AuditReport, Leakage, ProbeScore, Retrieval, Utility
from veil.checks.thresholds import AuditThresholds, Band
from veil.checks.verdict import RULE_EVERY_FIGURE, THREATS, UNREADABLE, Verdict, judge_audit
from veil.registry.card import verdict_record, worst_verdict
from veil.reporting.html import latest_live_verdict


def _score(accuracy: float, low: float, high: float, majority: float = 0.5) -> ProbeScore:
    return ProbeScore(
        accuracy=accuracy, balanced_accuracy=accuracy, majority=majority, interval_low=low, interval_high=high, n=1000
    )


def _report(
    linear: ProbeScore, trees: ProbeScore, share_after: float, task_after: float | None, base: float = 0.5
) -> AuditReport:
    raw = _score(0.99, 0.98, 1.0)
    return AuditReport(
        method="leace",
        rank=1,
        n_heldout=1000,
        dim=8,
        leakage=Leakage(
            linear_before=raw,
            linear_after=linear,
            nonlinear_before=None,
            nonlinear_after=None,
            guardedness_gap_before=None,
            guardedness_gap_after=None,
            trees_before=raw,
            trees_after=trees,
        ),
        utility=Utility(
            relative_distortion=0.05,
            mean_cosine=0.98,
            knn_overlap_at_10=0.9,
            task_accuracy_before=None if task_after is None else 0.95,
            task_accuracy_after=task_after,
        ),
        retrieval=Retrieval(attribute_share_before=0.9, attribute_share_after=share_after, attribute_base_rate=base),
    )


def test_figures_worked_by_hand() -> None:
    # Linear: interval [0.53, 0.59] against majority 0.5, so its edge nearest majority lies 0.03 beyond it (warn
    # at 0.02).  Trees: [0.44, 0.52] holds 0.5, so 0.  Neighbours: 0.58 - 0.5 = 0.08 (warn at 0.05).  Task:
    # 0.95 - 0.94 = 0.01 (below warn at 0.02).  The worst level is warn.
    verdict = judge_audit(_report(_score(0.56, 0.53, 0.59), _score(0.48, 0.44, 0.52), 0.58, 0.94), AuditThresholds())
    assert verdict.figures["linear_gap"] == pytest.approx(0.03)
    assert verdict.figures["strongest_gap"] == pytest.approx(0.03)  # the linear probe lies farthest from majority
    assert verdict.figures["neighbour_excess"] == pytest.approx(0.08)
    assert verdict.figures["task_loss"] == pytest.approx(0.01)
    assert verdict.status == "warn"
    assert verdict.reasons == [
        "the linear probe reads the attribute 0.030 beyond majority (warn at 0.02)",
        "the 10-NN attribute share lies 0.080 above its base rate (warn at 0.05)",
    ]


def test_a_probe_below_majority_is_no_leakage_and_the_worst_level_wins() -> None:
    # Trees at [0.30, 0.36] against majority 0.5: reliably below majority, which is what a cross-validated probe
    # with nothing to read does on unequal classes (it scores about Σ p², not max p): no leakage, so ok.
    quiet = judge_audit(_report(_score(0.5, 0.47, 0.53), _score(0.33, 0.30, 0.36), 0.5, 0.95), AuditThresholds())
    assert quiet.figures["strongest_gap"] == 0.0
    assert quiet.status == "ok"
    # Trees at [0.64, 0.70]: 0.14 beyond majority (alert at 0.10), the linear probe quiet; the worst level wins.
    verdict = judge_audit(_report(_score(0.5, 0.47, 0.53), _score(0.67, 0.64, 0.70), 0.5, 0.95), AuditThresholds())
    assert verdict.figures["linear_gap"] == 0.0
    assert verdict.figures["strongest_gap"] == pytest.approx(0.14)
    assert verdict.status == "alert"
    assert verdict.reasons == [
        "the strongest probe (boosted-trees probe) reads the attribute 0.140 beyond majority (alert at 0.1)"
    ]


def test_figures_without_data_are_not_judged_and_bands_are_read_at_or_above() -> None:
    # Binary fractions, so the difference 0.625 - 0.5 is exactly the band's 0.125.
    thresholds = AuditThresholds(neighbour_excess=Band(0.125, 0.25))
    verdict = judge_audit(_report(_score(0.5, 0.47, 0.53), _score(0.5, 0.47, 0.53), 0.625, None), thresholds)
    assert verdict.figures["task_loss"] is None
    assert verdict.status == "warn"  # 0.125 reaches the warn level of 0.125
    assert verdict.sentence() == "warn: the 10-NN attribute share lies 0.125 above its base rate (warn at 0.125)"
    calm = judge_audit(_report(_score(0.5, 0.47, 0.53), _score(0.5, 0.47, 0.53), 0.52, None), thresholds)
    assert calm.sentence() == "ok: all 3 judged figures are below their warn levels"


def test_round_off_never_decides_which_side_of_a_level_a_figure_falls() -> None:
    # 0.57 - 0.52 is 0.04999999999999993 in binary floating point; the gap is 0.05 and reaches alert at 0.05.
    assert 0.57 - 0.52 < 0.05
    verdict = judge_audit(
        _report(_score(0.6, 0.57, 0.63, majority=0.52), _score(0.5, 0.47, 0.53), 0.5, 0.95), AuditThresholds()
    )
    assert verdict.figures["linear_gap"] == pytest.approx(0.05)
    assert verdict.reasons[0] == "the linear probe reads the attribute 0.050 beyond majority (alert at 0.05)"
    assert Band(0.02, 0.05).level(0.57 - 0.52) == "alert"


def test_the_latest_live_checks_headline_counts_the_figures_it_was_judged_on() -> None:
    quiet = {
        "checked_at": "2027-01-16T07:00:00+00:00", "status": "ok", "reasons": [], "leakage_gap": 0.0,
        "mean_shift": 0.1, "covariance_shift": 0.0, "erased_variance_ratio": 1.0, "prior_shift": None,
    }  # fmt: skip
    (paragraph,) = latest_live_verdict([quiet])
    # Four figures had values to judge; the prior shift had none (no labels): it is not counted.
    assert "All 4 judged figures are below their warn levels." in paragraph


def test_an_audit_whose_raw_rows_show_no_attribute_is_not_a_pass() -> None:
    # Labels that carry nothing (permuted, or a sample too small): the probes read nothing before erasure either.
    blind = _score(0.49, 0.46, 0.52)
    report = _report(_score(0.5, 0.47, 0.53), _score(0.5, 0.47, 0.53), 0.5, 0.95)
    nothing = dataclasses.replace(
        report, leakage=dataclasses.replace(report.leakage, linear_before=blind, trees_before=blind)
    )
    verdict = judge_audit(nothing, AuditThresholds())
    assert verdict.status == "warn"
    assert verdict.reasons == [UNREADABLE]
    # The same figures after erasure, with an attribute the raw rows show plainly: a pass.
    assert judge_audit(report, AuditThresholds()).status == "ok"


def _with_context(report: AuditReport, linear: ProbeScore, trees: ProbeScore, share_after: float) -> AuditReport:
    """``report`` with an audit within a context: floor 0.6 (the scores' majority), neighbours' base 0.6."""
    raw = _score(0.95, 0.93, 0.97, majority=0.6)
    context = ContextAudit(
        column="field", rows=1000, floor=0.6, before={"linear": raw, "trees": raw},
        after={"linear": linear, "trees": trees}, values=(), skipped=(), nn_share_before=0.9,
        nn_share_after=share_after, nn_base_rate=0.6,
    )  # fmt: skip
    return dataclasses.replace(report, context=context)


def test_each_threat_is_at_the_worst_level_of_its_own_figures() -> None:
    # Worked by hand against the default bands: linear [0.53, 0.59] over majority 0.5 is 0.03 (warn at 0.02);
    # trees [0.64, 0.70] is 0.14, the strongest (alert at 0.10); neighbours 0.58 - 0.5 = 0.08 (warn at 0.05).
    # Within the context (floor 0.6): linear [0.59, 0.65] reaches the floor, so 0 (ok); trees [0.67, 0.73] is
    # 0.07 (warn at 0.05); neighbours 0.72 - 0.6 = 0.12 (alert at 0.10).
    report = _with_context(
        _report(_score(0.56, 0.53, 0.59), _score(0.67, 0.64, 0.70), 0.58, 0.94),
        _score(0.62, 0.59, 0.65, majority=0.6),
        _score(0.70, 0.67, 0.73, majority=0.6),
        0.72,
    )
    verdict = judge_audit(report, AuditThresholds(), claims=tuple(THREATS))
    assert {name: threat.status for name, threat in verdict.threats.items()} == {
        "linear": "warn",
        "nonlinear": "alert",
        "neighbours": "warn",
        "context-linear": "ok",
        "context-nonlinear": "warn",
        "context-neighbours": "alert",
    }
    assert verdict.threats["nonlinear"].reasons == [
        "the strongest probe (boosted-trees probe) reads the attribute 0.140 beyond majority (alert at 0.1)"
    ]
    assert verdict.threats["context-linear"].reasons == []
    assert verdict.status == "alert"
    # Claiming the linear threats only: the worst of those (warn), the others shown as not claimed.
    linear = judge_audit(report, AuditThresholds(), claims=("linear", "context-linear"))
    assert linear.status == "warn"
    assert linear.reasons == ["the linear probe reads the attribute 0.030 beyond majority (warn at 0.02)"]
    assert linear.sentence().endswith(
        "; not claimed: nonlinear readers alert, neighbours and rankings warn, nonlinear readers within the context "
        "warn, neighbours within the context alert"
    )
    # The record reads back whole, as a card or an audit record stores it.
    assert Verdict.from_dict(json.loads(json.dumps(linear.to_dict(), sort_keys=True))) == linear
    assert list(Verdict.from_dict(json.loads(json.dumps(linear.to_dict(), sort_keys=True))).threats) == list(THREATS)


def test_a_linear_eraser_read_by_nonlinear_probes_is_judged_on_what_it_claims() -> None:
    # LEACE's guarantee: no linear probe reads the attribute; nonlinear ones may (here trees at [0.64, 0.70] over
    # majority 0.5, 0.14: alert at 0.10).  The linear probe at [0.47, 0.53] reaches majority: 0.
    report = _report(_score(0.5, 0.47, 0.53), _score(0.67, 0.64, 0.70), 0.52, 0.95)
    claimed = judge_audit(report, AuditThresholds(), claims=("linear",))
    assert claimed.status == "ok"
    assert claimed.threats["nonlinear"].status == "alert"
    assert claimed.unclaimed("nonlinear")
    assert claimed.sentence() == (
        "ok: every figure of the claimed threats (linear readers) and of the task is below its warn level; "
        "not claimed: nonlinear readers alert, neighbours and rankings ok"
    )
    lines = claimed.threat_lines()
    assert any(line.startswith("nonlinear readers") and "not claimed: alert" in line for line in lines)
    # No context was audited: its threats are neither measured nor claimed, so not listed.
    assert not any("within the context" in line for line in lines)
    # Widening the claim to nonlinear readers makes the same audit alert.
    assert judge_audit(report, AuditThresholds(), claims=("linear", "nonlinear")).status == "alert"
    # Without claims (a card written before them), every figure is judged, as it was then.
    before = judge_audit(report, AuditThresholds())
    assert before.status == "alert"
    assert before.threat_lines() == [f"rule: {RULE_EVERY_FIGURE}"]
    # The linear probe alone (--probes linear) measures no nonlinear reader: claimed, it judges nothing, and says so.
    linear_only = dataclasses.replace(
        report, leakage=dataclasses.replace(report.leakage, trees_before=None, trees_after=None)
    )
    blind = judge_audit(linear_only, AuditThresholds(), claims=("linear", "nonlinear"))
    # A claim the audit could not check is not a pass: at least warn, and it says why.
    assert (blind.status, blind.threats["nonlinear"].measured) == ("warn", False)
    assert "claimed but not measured by this audit: nonlinear readers" in blind.sentence()
    assert blind.sentence().count("not measured") == 1
    # A threat claimed but not measured (a context, on rows without one) is said so, and warns.
    unmeasured = judge_audit(report, AuditThresholds(), claims=("linear", "context-linear"))
    assert unmeasured.status == "warn"
    assert any(line.startswith("linear readers within the context") and "not measured" in line for line in
               unmeasured.threat_lines())  # fmt: skip


def test_the_task_cost_is_judged_whatever_is_claimed_and_unknown_threats_are_refused() -> None:
    # Task: 0.95 - 0.89 = 0.06, alert at 0.05; every threat's figure is quiet.
    report = _report(_score(0.5, 0.47, 0.53), _score(0.5, 0.47, 0.53), 0.5, 0.89)
    assert judge_audit(report, AuditThresholds(), claims=("neighbours",)).status == "alert"
    with pytest.raises(ValueError, match="unknown threat 'quadratic'"):
        judge_audit(report, AuditThresholds(), claims=("quadratic",))


def test_several_attributes_give_each_threat_the_worst_status_of_any() -> None:
    quiet = _report(_score(0.5, 0.47, 0.53), _score(0.5, 0.47, 0.53), 0.5, 0.95)
    read = _report(_score(0.5, 0.47, 0.53), _score(0.67, 0.64, 0.70), 0.5, 0.95)
    entries = [
        {"name": name, "verdict": verdict_record(one, AuditThresholds(), ("linear",))}
        for name, one in (("pronoun", quiet), ("age", read))
    ]
    merged = Verdict.from_dict(worst_verdict(entries[0]["verdict"], entries))
    assert merged.status == "ok"
    assert merged.threats["nonlinear"].status == "alert"
    assert merged.threats["nonlinear"].reasons == [
        "age: the strongest probe (boosted-trees probe) reads the attribute 0.140 beyond majority (alert at 0.1)"
    ]
