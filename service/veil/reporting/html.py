"""Render a version's report as one self-contained HTML page (plots inlined as SVG, no external resources).

The page is written for an auditor who has not read the docs: the verdicts
first, in plain words, with the rule; then what was fitted on what, the live
checks over time and the fresh audits; then every figure with its meaning and
chance level, the plots, and the cautions.  It prints: no plot or table is
split across pages.
"""

from __future__ import annotations

import html
from collections.abc import Mapping, Sequence
from dataclasses import fields
from typing import Any

from veil.checks.thresholds import AlertThresholds
from veil.checks.verdict import RULE, Verdict
from veil.registry import Registry
from veil.registry.card import (
    card_audit,
    card_thresholds,
    card_verdict,
    method_text,
    operating_points_text,
    protocol_text,
)
from veil.reporting import headline, sections
from veil.reporting import plots as drawn
from veil.reporting.attributes import attributes_section
from veil.reporting.context import context_section
from veil.reporting.groups import groups_section
from veil.reporting.independence import independence_section
from veil.reporting.plotdata import PLOT_DATA_FILE, PlotData
from veil.reporting.rows import rows_section

REPORT_FILE = "report.html"
_STYLE = """
body { font: 15px/1.45 system-ui, sans-serif; margin: 2em auto; max-width: 1080px; color: #1d2430; padding: 0 1em; }
h1 { font-size: 1.6em; margin-bottom: .2em; }
h2 { font-size: 1.2em; margin-top: 1.8em; border-bottom: 1px solid #d8dde6; }
h3 { font-size: 1em; margin: 1.2em 0 .2em; }
table { border-collapse: collapse; margin: .6em 0; } td, th { padding: .25em .8em; border-bottom: 1px solid #eef0f4; }
th { text-align: left; font-weight: 600; } .muted { color: #5b6575; } .strongest { background: #eef4fb; }
table.probes td { white-space: nowrap; } table.figures td:nth-child(5) { font-size: 13px; color: #3c4656; }
.caution { background: #fff6e0; border-left: 4px solid #e0a800; padding: .6em 1em; margin: 1em 0; }
figure { margin: 1em 0; } figure svg { max-width: 100%; height: auto; }
pre { background: #f5f7fa; padding: .8em; font-size: 13px; white-space: pre-wrap; overflow-wrap: anywhere; }
@media print {
  body { margin: 0; max-width: none; font-size: 12px; }
  figure, table, pre, .caution { break-inside: avoid; }
  h2, h3 { break-after: avoid; }
  pre { font-size: 10px; }
}
"""
_CAUTION = (
    "Linear erasure removes what a linear model can read; nonlinear models may still recover traces (see the "
    "nonlinear probes' figures). Every figure here holds for the data measured and its distribution only. This "
    "report is no legal or compliance guarantee: defer to local law and qualified review."
)


def latest_live_evidence(
    checks: Sequence[dict[str, Any]], bands: Mapping[str, Mapping[str, float]]
) -> list[headline.Evidence]:
    """The latest live check as the headline's evidence (none without checks), judged by the card's ``bands``."""
    if not checks:
        return []
    latest = checks[-1]
    # The figures the check was judged on, as the service's answer the record holds gives them (None where it
    # had none to judge); a body without that answer holds them itself.
    answer = latest.get("report", latest)
    figures = {figure.name: answer.get(figure.name) for figure in fields(AlertThresholds)}
    verdict = Verdict(latest["status"], figures, list(latest["reasons"]))
    when = headline.utc_text(latest["checked_at"])
    return [headline.Evidence(f"Latest live check ({when})", f"the latest live check, at {when},", verdict, bands)]


def latest_live_verdict(
    checks: Sequence[dict[str, Any]], bands: Mapping[str, Mapping[str, float]] | None = None
) -> list[str]:
    """The headline's entry of the latest live check (none without checks)."""
    return [headline.evidence_item(item) for item in latest_live_evidence(checks, bands or {})]


def evidence(
    card: dict[str, Any], audits: Sequence[tuple[int, dict[str, Any]]], checks: Sequence[dict[str, Any]]
) -> list[headline.Evidence]:
    """The evidence the headline reads: the audit at fitting time, the latest fresh audit, the latest live check."""
    audit_bands = card_thresholds(card).to_dict()
    items = [headline.Evidence("Audit at fitting time", "the audit at fitting time", card_verdict(card), audit_bands)]
    if audits:
        number, body = audits[-1]
        items.append(
            headline.Evidence(
                f"Latest fresh audit ({number})",
                f"fresh audit {number}, the latest,",
                Verdict.from_dict(body["verdict"]),
                audit_bands,
            )
        )
    return items + latest_live_evidence(checks, card["thresholds"])


def render_report(
    version_id: str,
    card: dict[str, Any],
    history: Sequence[dict[str, float]],
    plots: PlotData,
    audits: Sequence[tuple[int, dict[str, Any]]] = (),
    checks: Sequence[dict[str, Any]] = (),
) -> str:
    """The report page of one version, from its card, the eraser's iteration history and the plot data.

    ``audits`` are the version's fresh audits as ``(number, record body)``,
    and ``checks`` the bodies of its recorded live checks, oldest first.
    """
    audit = card_audit(card)
    classes = card["attribute"]["classes"]
    summary = [
        ("eraser", f"{card['name']} {version_id}"),
        ("method", f"{method_text(card)}, {card['dtype']}"),
        ("attribute", f"{card['attribute']['key']} ({', '.join(classes)})"),
        ("fitting data", f"{card['data']['rows']} rows ({card['data']['fit_rows']} fit, {audit.n_heldout} held out)"),
        ("data sha256", card["data"]["fingerprint_sha256"]),
        ("split", f"row-index hash, seed {card['split']['seed']}, {card['split']['holdout']:.0%} held out"),
        ("probes", protocol_text(audit)),
        ("created", f"{card['created_at']} by {card['created_by']}"),
        ("software", ", ".join(f"{k} {v}" for k, v in card["software"].items())),
    ]
    live_bands = [
        (figure, f"warn {band['warn']}, alert {band['alert']}") for figure, band in card["thresholds"].items()
    ]
    iterations_missing = f"{card['method']} is fitted in closed form: there are no iterations to plot."
    parts = [
        f"<h1>veil report: {html.escape(card['name'])} {html.escape(version_id)}</h1>",
        headline.headline(f"{card['name']} {version_id}", evidence(card, audits, checks), RULE),
        f'<p class="caution">{html.escape(_CAUTION)}</p>',
        "<h2>Version</h2>" + sections.table(summary),
        sections.figure(
            "Live checks over time",
            drawn.timeline_plot(checks, card["thresholds"]),
            (12, 3.0),
            "",
        )
        if checks
        else "<h2>Live checks over time</h2>",
        sections.live_checks(checks),
        sections.fresh_audits(audits),
        sections.figures_table(audit),
        sections.figure("Leakage before and after erasure", drawn.leakage_plot(audit), (8, 3.6), ""),
        sections.probe_table(audit),
        context_section(audit),
        groups_section(audit),
        rows_section(audit),
        independence_section(audit),
        attributes_section(card),
        sections.figure(
            "Retrieval: who the nearest neighbours are", drawn.retrieval_plot(audit), (7, 3.4), "No retrieval figures."
        ),
        sections.ranking_table(audit),
        sections.figure(
            "Operating points",
            drawn.operating_points_plot(card.get("operating_points")),
            (11, 4.2),
            "No strength sweep was run for this version (veil fit --sweep, --target).",
        ),
        *(
            [f"<pre>{html.escape(chr(10).join(operating_points_text(card['operating_points'])))}</pre>"]
            if "operating_points" in card
            else []
        ),
        sections.figure(
            "Fitting iterations", drawn.history_plot(card["method"], history), (7, 3.2), iterations_missing
        ),
        sections.figure(
            "Held-out embeddings, coloured by attribute", drawn.scatter_plot(plots, classes), (11, 4.4), ""
        ),
        sections.figure("Per-vector distortion", drawn.distortion_plot(plots), (7, 3.2), ""),
        "<h2>Threats at fitting time</h2>" + sections.threats_table(card_verdict(card)),
        "<h2>Audit thresholds</h2>" + sections.audit_thresholds_table(card),
        "<h2>Alert thresholds of the live checks</h2>" + sections.table(live_bands),
        f"<h2>Full audit</h2><pre>{html.escape(audit.format_table())}</pre>",
    ]
    notes = card.get("notes", [])
    if notes:
        parts.append("<h2>Notes</h2><ul>" + "".join(f"<li>{html.escape(n)}</li>" for n in notes) + "</ul>")
    title = html.escape(f"veil report {card['name']} {version_id}")
    return (
        f'<!DOCTYPE html><html lang="en"><head><meta charset="utf-8"><title>{title}</title>'
        f"<style>{_STYLE}{headline.STYLE}</style></head><body>{''.join(parts)}</body></html>"
    )


def version_report(registry: Registry, name: str, reference: str) -> str:
    """The report page of a stored version with its fresh audits and recorded live checks (all verified)."""
    stored = registry.read_version(name, reference)
    plots = PlotData.from_bytes(stored.files[PLOT_DATA_FILE])
    audits = [(record.number, record.body) for record in registry.records(name, stored.id, "audits")]
    checks = sorted((record.body for record in registry.records(name, stored.id, "checks")), key=_checked_at)
    return render_report(stored.id, dict(stored.card), stored.artifact.history, plots, audits, checks)


def _checked_at(body: dict[str, Any]) -> str:
    return str(body["checked_at"])
