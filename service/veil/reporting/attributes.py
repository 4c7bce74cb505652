"""The report's section on a version of several attributes: each one's figures, the intersection's too."""

from __future__ import annotations

import html
from collections.abc import Mapping
from typing import Any

from veil.audit.report import AuditReport, ProbeScore, RegressionScore
from veil.checks.verdict import Verdict


def _linear_text(report: AuditReport) -> str:
    before, after = report.leakage.linear_before, report.leakage.linear_after
    if isinstance(before, RegressionScore) and isinstance(after, RegressionScore):
        return f"ridge R² {before.r2:.3f} → {after.r2:.3f} (0: no linear trace)"
    assert isinstance(before, ProbeScore)
    assert isinstance(after, ProbeScore)
    return f"{before.accuracy:.3f} → {after.with_interval()} (majority {after.majority:.3f})"


def _smallest_class_text(entry: Mapping[str, Any], report: AuditReport) -> str:
    """The smallest class, its share and its recall after erasure: a small class must not hide in the accuracy."""
    after = report.leakage.linear_after
    priors = entry.get("priors")
    if not priors or not isinstance(after, ProbeScore) or after.recall is None:
        return "-"
    smallest = min(range(len(priors)), key=priors.__getitem__)
    return f"{entry['classes'][smallest]}: {priors[smallest]:.1%} of rows, recall after {after.recall[smallest]:.3f}"


def attributes_section(card: Mapping[str, Any]) -> str:
    """An HTML table of every attribute a version guards (empty for a version of one attribute)."""
    entries = card.get("attributes", [])
    if not entries:
        return ""
    header = "".join(
        f"<th>{html.escape(text)}</th>"
        for text in ("attribute", "kind", "fitting rows", "linear probe before → after", "smallest class", "verdict")
    )
    rows = []
    for entry in entries:
        report = AuditReport.from_dict(entry["audit"])
        cells = (
            entry["name"],
            entry["kind"],
            str(entry["fit_rows"]),
            _linear_text(report),
            _smallest_class_text(entry, report),
            Verdict.from_dict(entry["verdict"]).status,
        )
        rows.append("<tr>" + "".join(f"<td>{html.escape(cell)}</td>" for cell in cells) + "</tr>")
    return (
        '<h2>Attributes</h2><p class="muted">Each attribute is audited on its own on the held-out rows (the '
        "figures above are the first one's); the intersection, when guarded, is audited as one attribute of joint "
        f"classes.</p><table><tr>{header}</tr>{''.join(rows)}</table>"
    )
