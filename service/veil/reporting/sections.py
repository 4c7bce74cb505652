"""The report's sections other than plots and the headline: tables of figures, and what each figure means."""

from __future__ import annotations

import html
from collections.abc import Sequence
from typing import Any

from veil.audit.report import PROBE_LABELS, AuditReport, ProbeScore
from veil.checks.verdict import MEANINGS, RULE_EVERY_FIGURE, THREATS, Verdict
from veil.registry.card import card_thresholds, protocol_text
from veil.reporting.headline import status_mark, utc_text
from veil.reporting.plots import Draw, svg


def probe_table(audit: AuditReport) -> str:
    """Each probe's held-out figures before and after erasure, per class too; the strongest after is marked."""
    lk = audit.leakage
    chance = audit.balanced_chance
    classes = audit.classes or ()
    header = [
        "probe",
        "accuracy before [95%]",
        "accuracy after [95%]",
        "majority",
        "balanced accuracy after" + ("" if chance is None else f" (chance {chance:.3f})"),
        *(f"recall after: {label}" for label in classes),
    ]
    body = []
    strongest = lk.strongest if audit.strongest_after() is not None else None
    for name, before, after in lk.probes():
        if not (isinstance(before, ProbeScore) and isinstance(after, ProbeScore)):
            continue
        # Cards written before per-class figures have no recall.
        recall = [f"{value:.3f}" for value in after.recall or ()] or ["not recorded"] * len(classes)
        cells = [
            PROBE_LABELS[name] + (" (strongest)" if name == strongest else ""),
            before.with_interval(),
            after.with_interval(),
            f"{after.majority:.3f}",
            f"{after.balanced_accuracy:.3f}",
            *recall,
        ]
        marked = ' class="strongest"' if name == strongest else ""
        body.append(f"<tr{marked}>" + "".join(f"<td>{html.escape(cell)}</td>" for cell in cells) + "</tr>")
    if not body:
        return (
            '<h2>Probes</h2><p class="muted">A continuous attribute: only the ridge probe ran (see the full audit).</p>'
        )
    head = "<tr>" + "".join(f"<th>{html.escape(cell)}</th>" for cell in header) + "</tr>"
    text = f"Probes: {protocol_text(audit)}."
    if strongest is not None:
        text += (
            " The strongest is the probe with the most held-out rows right after erasure (a tie goes to the one "
            "listed first); where intervals overlap, the order between those probes is not settled."
        )
    return f'<h2>Probes</h2><p class="muted">{html.escape(text)}</p><table class="probes">{head}{"".join(body)}</table>'


def audit_thresholds_table(card: dict[str, Any]) -> str:
    head = "<tr><th>figure</th><th>what it means</th><th>warn at</th><th>alert at</th></tr>"
    rows = [
        f"<tr><td>{html.escape(figure)}</td><td>{html.escape(MEANINGS[figure])}</td><td>{band['warn']:g}</td>"
        f"<td>{band['alert']:g}</td></tr>"
        for figure, band in card_thresholds(card).to_dict().items()
    ]
    return f"<table>{head}{''.join(rows)}</table>"


def ranking_table(audit: AuditReport) -> str:
    """The ranking-fairness figures before and after erasure, on the same queries."""
    if audit.ranking is None:
        return '<h2>Ranking fairness</h2><p class="muted">Not recorded (an older card, or a continuous attribute).</p>'
    rk = audit.ranking
    text = (
        f"Each of the {rk.queries} held-out rows queries the others by cosine; figures are means over the queries "
        f"of one query's top {rk.k}, before and after erasure. Skew@k is ln(share / base rate); NDKL is the "
        "DCG-discounted mean KL divergence of each top-i prefix's class shares from the base rates (0 is ideal); "
        "exposure weighs position i by 1 / log2(i + 1)."
    )
    head = "<tr><th>figure</th><th>before</th><th>after</th></tr>"
    body = "".join(
        "<tr>" + "".join(f"<td>{html.escape(cell)}</td>" for cell in row) + "</tr>" for row in rk.rows(audit.classes)
    )
    return f'<h2>Ranking fairness</h2><p class="muted">{html.escape(text)}</p><table>{head}{body}</table>'


def table(rows: Sequence[tuple[str, str]]) -> str:
    cells = "".join(f"<tr><th>{html.escape(a)}</th><td>{html.escape(b)}</td></tr>" for a, b in rows)
    return f"<table>{cells}</table>"


def figure(title: str, draw: Draw | None, size: tuple[float, float], missing: str) -> str:
    body = svg(draw, size) if draw is not None else f'<p class="muted">{html.escape(missing)}</p>'
    return f'<h2>{html.escape(title)}</h2><figure class="plot">{body}</figure>'


def _capitalized(text: str) -> str:
    return text[:1].upper() + text[1:]


def verdict_paragraph(title: str, verdict: Verdict) -> str:
    detail = _capitalized(verdict.sentence().split(": ", 1)[1])
    return (
        f'<p class="verdict verdict-{html.escape(verdict.status)}"><strong>{html.escape(title)}: '
        f"{html.escape(verdict.status)}</strong>. {html.escape(detail)}.</p>"
    )


def threats_table(verdict: Verdict) -> str:
    """Each threat the verdict measured or the version claims: claimed or not, its status, and why.

    Nothing for a verdict judged on every figure (a card written before claims): its paragraph says so.
    """
    if verdict.claimed is None:
        return f'<p class="muted">{html.escape(_capitalized(RULE_EVERY_FIGURE))}.</p>'
    head = "<tr><th>threat</th><th>claimed</th><th>status</th><th>why</th></tr>"
    rows = []
    for name, threat in verdict.threats.items():
        claimed = name in verdict.claimed
        if not (claimed or threat.measured):
            continue
        status = threat.status if threat.measured else "not measured"
        why = "; ".join(threat.reasons) or ("every figure below its warn level" if threat.measured else "")
        rows.append(
            f'<tr data-threat="{html.escape(name)}"><td>{html.escape(THREATS[name][0])}</td>'
            f"<td>{'claimed' if claimed else 'not claimed (shown, not judged)'}</td>"
            f'<td class="status verdict-{html.escape(status)}">{html.escape(status)}</td>'
            f"<td>{html.escape(why)}</td></tr>"
        )
    return f'<table class="threats">{head}{"".join(rows)}</table>'


def fresh_audits(audits: Sequence[tuple[int, dict[str, Any]]]) -> str:
    if not audits:
        return (
            '<h2>Fresh audits</h2><p class="muted">None yet: <code>veil audit NAME VERSION --data FRESH</code> '
            "audits the version on a sample drawn after it and records the result beside it.</p>"
        )
    head = (
        "<tr><th>#</th><th>when, by whom</th><th>attribute</th><th>data</th><th>rows</th><th>status</th>"
        "<th>why</th></tr>"
    )
    rows = []
    for number, body in audits:
        verdict = Verdict.from_dict(body["verdict"])
        data = body["data"]
        files = ", ".join(data["files"]) or "a sample"
        why = "; ".join(verdict.reasons) or "every judged figure below its warn level"
        rows.append(
            f"<tr><td>{number}</td><td>{html.escape(body['audited_at'])} by {html.escape(body['audited_by'])}</td>"
            f"<td>{html.escape(data['attribute'])}</td>"
            f"<td>{html.escape(files)} (sha256 {html.escape(data['fingerprint_sha256'][:12])})</td>"
            f'<td>{data["audited_rows"]}</td><td class="status">{status_mark(verdict.status)}</td>'
            f"<td>{html.escape(why)}</td></tr>"
        )
    return f"<h2>Fresh audits</h2><table>{head}{''.join(rows)}</table>"


def figures_table(audit: AuditReport) -> str:
    """Every figure of the audit, before and after, each with a one-line meaning and its chance level.

    One small table per group of figures (the baseline, each probe, the costs, ...), so each prints whole.
    """
    head = "<tr><th>figure</th><th>before</th><th>after</th><th>chance level</th><th>what it means</th></tr>"
    groups: dict[str, list[str]] = {}
    for row in audit.figure_rows():
        groups.setdefault(row.group, []).append(
            f'<tr data-figure="{html.escape(row.key)}"><td>{html.escape(row.label)}</td>'
            f"<td>{html.escape(row.before)}</td><td>{html.escape(row.after)}</td><td>{html.escape(row.chance)}</td>"
            f"<td>{html.escape(row.meaning)}</td></tr>"
        )
    text = (
        "Chance level: what the figure reads when the embeddings say nothing about the attribute (or, for the "
        "costs, the value that means unchanged)."
    )
    tables = "".join(
        f'<h3>{html.escape(group)}</h3><table class="figures">{head}{"".join(rows)}</table>'
        for group, rows in groups.items()
    )
    return f'<h2>Every figure, and what it means</h2><p class="muted">{text}</p>{tables}'


def live_checks(checks: Sequence[dict[str, Any]]) -> str:
    """The recorded live checks (``veil patrol``): how many, of which status, and the latest ones."""
    if not checks:
        return (
            '<p class="muted">None recorded: <code>veil patrol NAME --service URL</code> asks the service for its '
            "checks and records each answer; <code>veil checks NAME</code> lists them.</p>"
        )
    counts = {level: sum(check["status"] == level for check in checks) for level in ("ok", "warn", "alert")}
    first, last = utc_text(checks[0]["checked_at"]), utc_text(checks[-1]["checked_at"])
    span = f"1 check, at {first}" if len(checks) == 1 else f"{len(checks)} checks from {first} to {last}"
    summary = (
        f"{span}: "
        + ", ".join(f"{count} {level}" for level, count in counts.items())
        + ". In the plot, the dashed line is each figure's warn level and the dotted one its alert level, as the "
        "card records them; a check's mark is a circle when ok, a triangle at warn and a square at alert."
    )
    head = "<tr><th>checked at</th><th>checked</th><th>rows</th><th>status</th><th>why</th></tr>"
    rows = "".join(
        f"<tr><td>{html.escape(check['checked_at'])}</td><td>{html.escape(check['checked']['kind'])}</td>"
        f'<td>{check["report"].get("rows", "")}</td><td class="status">{status_mark(check["status"])}</td>'
        f"<td>{html.escape('; '.join(check['reasons']))}</td></tr>"
        for check in checks[-LATEST_CHECKS:]
    )
    latest = f"The latest {min(len(checks), LATEST_CHECKS)}:"
    return f'<p class="muted">{html.escape(summary)}</p><p>{latest}</p><table>{head}{rows}</table>'


#: How many of the latest live checks the report lists (the plot shows them all).
LATEST_CHECKS = 10
