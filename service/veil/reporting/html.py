"""Render a version's report as one self-contained HTML page (plots inlined as SVG, no external resources)."""

from __future__ import annotations

import html
import io
from collections.abc import Callable, Sequence
from typing import Any

import matplotlib

matplotlib.use("Agg")  # no display on servers; must precede pyplot
import matplotlib.pyplot as plt
import numpy as np
from matplotlib.figure import Figure

from veil.audit.points import Sweep, value_text
from veil.audit.report import PROBE_LABELS, AuditReport, ProbeScore
from veil.checks.verdict import MEANINGS, RULE, Verdict
from veil.registry.card import (
    card_audit,
    card_thresholds,
    card_verdict,
    method_text,
    operating_points_text,
    protocol_text,
)
from veil.reporting.attributes import attributes_section
from veil.reporting.plotdata import PlotData

REPORT_FILE = "report.html"
_STYLE = """
body { font: 15px/1.45 system-ui, sans-serif; margin: 2em auto; max-width: 1080px; color: #1d2430; padding: 0 1em; }
h1 { font-size: 1.6em; margin-bottom: .2em; }
h2 { font-size: 1.2em; margin-top: 1.8em; border-bottom: 1px solid #d8dde6; }
table { border-collapse: collapse; margin: .6em 0; } td, th { padding: .25em .8em; border-bottom: 1px solid #eef0f4; }
th { text-align: left; font-weight: 600; } .muted { color: #5b6575; } .strongest { background: #eef4fb; }
table.probes td { white-space: nowrap; }
.caution { background: #fff6e0; border-left: 4px solid #e0a800; padding: .6em 1em; margin: 1em 0; }
figure { margin: 1em 0; } figure svg { max-width: 100%; height: auto; }
pre { background: #f5f7fa; padding: .8em; overflow-x: auto; font-size: 13px; }
.verdict { padding: .6em 1em; margin: 1em 0; border-left: 4px solid; }
.verdict-ok { background: #e9f7ef; border-color: #2f855a; }
.verdict-warn { background: #fff6e0; border-color: #e0a800; }
.verdict-alert { background: #fdecec; border-color: #c53030; }
"""
_BEFORE, _AFTER = "#8a94a6", "#2b6cb0"
_CAUTION = (
    "Linear erasure removes what a linear model can read; nonlinear models may still recover traces (see the "
    "nonlinear probes' figures). Every figure here holds for the data measured and its distribution only. This "
    "report is no legal or compliance guarantee: defer to local law and qualified review."
)


def _svg(draw: Callable[[Figure], None], size: tuple[float, float]) -> str:
    with plt.rc_context({"svg.hashsalt": "veil-report", "font.size": 10, "svg.fonttype": "none"}):
        figure = plt.figure(figsize=size)
        try:
            draw(figure)
            figure.tight_layout()
            buffer = io.StringIO()
            figure.savefig(buffer, format="svg", metadata={"Date": None})
        finally:
            plt.close(figure)
    text = buffer.getvalue()
    return text[text.index("<svg") :]


def _leakage_plot(audit: AuditReport) -> Callable[[Figure], None]:
    pairs = [
        (PROBE_LABELS[name].removesuffix(" probe"), before, after) for name, before, after in audit.leakage.probes()
    ]

    def draw(figure: Figure) -> None:
        axes = figure.add_subplot()
        majority = None
        for index, (_, before, after) in enumerate(pairs):
            for offset, score, colour, when in ((-0.18, before, _BEFORE, "before"), (0.18, after, _AFTER, "after")):
                if not isinstance(score, ProbeScore):
                    continue
                majority = score.majority
                # Clipped at 0: rounding can put an accuracy of 1.0 a hair above its interval's top.
                error = [
                    [max(score.accuracy - score.interval_low, 0.0)],
                    [max(score.interval_high - score.accuracy, 0.0)],
                ]
                axes.bar(index + offset, score.accuracy, width=0.34, color=colour, label=when if index == 0 else None)
                axes.errorbar(index + offset, score.accuracy, yerr=error, color="#1d2430", capsize=4)
        if majority is not None:
            axes.axhline(majority, color="#c53030", linestyle="--", linewidth=1, label=f"majority {majority:.3f}")
        axes.set_xticks(range(len(pairs)), [p[0] for p in pairs])
        axes.set_ylim(0, 1.05)
        axes.set_ylabel("held-out accuracy (95% interval)")
        # Beside the axes: with five probes, bars fill every corner inside them.
        axes.legend(loc="center left", bbox_to_anchor=(1.01, 0.5))

    return draw


def _history_plot(method: str, history: Sequence[dict[str, float]]) -> Callable[[Figure], None] | None:
    if not history:
        return None
    steps = [h["iteration"] + 1 for h in history]

    def draw(figure: Figure) -> None:
        axes = figure.add_subplot()
        if method == "inlp":
            axes.plot(steps, [h["accuracy"] for h in history], marker="o", color=_AFTER, label="classifier accuracy")
            axes.plot(steps, [h["majority"] for h in history], linestyle="--", color="#c53030", label="majority")
            axes.set_xlabel("INLP iteration (classifier removed)")
            axes.set_ylabel("validation accuracy")
        else:
            axes.plot(steps, [h["loss"] for h in history], color=_AFTER, linewidth=1, label="classifier loss")
            # Versions stored before the histories carried it have no target line.
            if "prior_entropy" in history[0]:
                target = [h["prior_entropy"] for h in history]
                axes.plot(steps, target, linestyle="--", color="#c53030", label="prior entropy (nothing learned)")
            axes.set_xlabel("R-LACE iteration")
            axes.set_ylabel("adversary cross-entropy (higher = less leakage)")
        axes.legend(loc="best")

    return draw


def _scatter_plot(plots: PlotData, classes: Sequence[str]) -> Callable[[Figure], None]:
    def draw(figure: Figure) -> None:
        colours = plt.get_cmap("tab10")
        for position, (title, points) in enumerate(
            (("before erasure", plots.plane_before), ("after erasure", plots.plane_after)), start=1
        ):
            axes = figure.add_subplot(1, 2, position)
            for code, label in enumerate(classes):
                chosen = plots.plane_codes == code
                axes.scatter(
                    points[chosen, 0], points[chosen, 1], s=6, alpha=0.6, color=colours(code % 10), label=label
                )
            axes.set_title(f"held-out rows {title}: leading two principal axes")
            axes.set_xlabel("PC 1")
            axes.set_ylabel("PC 2")
            axes.legend(loc="best", markerscale=2)

    return draw


def _distortion_plot(plots: PlotData) -> Callable[[Figure], None]:
    def draw(figure: Figure) -> None:
        axes = figure.add_subplot()
        axes.hist(plots.distortion, bins=50, color=_AFTER)
        mean = float(np.mean(plots.distortion))
        axes.axvline(mean, color="#c53030", linestyle="--", linewidth=1, label=f"mean {mean:.4f}")
        axes.set_xlabel("‖x' − x‖² / E‖x − μ‖² per held-out vector")
        axes.set_ylabel("vectors")
        axes.legend()

    return draw


def _retrieval_plot(audit: AuditReport) -> Callable[[Figure], None] | None:
    rt = audit.retrieval
    if rt is None:
        return None
    groups = [("attribute", rt.attribute_share_before, rt.attribute_share_after, rt.attribute_base_rate)]
    if rt.task_share_before is not None and rt.task_share_after is not None and rt.task_base_rate is not None:
        groups.append(("task", rt.task_share_before, rt.task_share_after, rt.task_base_rate))

    def draw(figure: Figure) -> None:
        axes = figure.add_subplot()
        for index, (_, before, after, base) in enumerate(groups):
            axes.bar(index - 0.18, before, width=0.34, color=_BEFORE, label="before" if index == 0 else None)
            axes.bar(index + 0.18, after, width=0.34, color=_AFTER, label="after" if index == 0 else None)
            axes.hlines(
                base,
                index - 0.4,
                index + 0.4,
                color="#c53030",
                linestyle="--",
                label="_" if index else "base rate",
            )
        axes.set_xticks(range(len(groups)), [f"neighbours sharing the {g[0]}" for g in groups])
        axes.set_ylim(0, 1.05)
        axes.set_ylabel("share of 10 nearest neighbours (cosine)")
        axes.legend(loc="lower right")

    return draw


def _operating_points_plot(record: dict[str, Any] | None) -> Callable[[Figure], None] | None:
    """Leakage and utility figures of each point of a sweep, against their references; the chosen point marked."""
    if record is None:
        return None
    sweep = Sweep.from_dict(record)
    positions = list(range(len(sweep.values)))
    labels = [value_text(value) for value in sweep.values]

    def series(name: str) -> list[float]:
        return [float(getattr(point, name)) for point in sweep.points]

    def draw(figure: Figure) -> None:
        leakage, utility = figure.add_subplot(1, 2, 1), figure.add_subplot(1, 2, 2)
        leakage.plot(positions, series("linear"), marker="o", color=_AFTER, label="linear probe")
        leakage.plot(positions, series("strongest"), marker="s", color="#805ad5", label="strongest probe")
        leakage.plot(positions, series("nn_attribute"), marker="^", color="#dd6b20", label="10-NN attribute share")
        leakage.axhline(sweep.baselines.majority, color="#c53030", linestyle="--", label="majority")
        leakage.axhline(sweep.baselines.nn_attribute_base, color="#dd6b20", linestyle=":", label="10-NN base rate")
        leakage.set_title("what is left of the attribute (lower is better)")
        utility.plot(positions, series("distortion"), marker="o", color=_BEFORE, label="distortion")
        if sweep.raw.task is not None and sweep.raw.nn_task is not None:
            utility.plot(positions, series("task"), marker="s", color="#2f855a", label="task probe")
            utility.plot(positions, series("nn_task"), marker="^", color="#38a169", label="10-NN task share")
            utility.axhline(sweep.raw.task, color="#2f855a", linestyle="--", label="task probe, raw")
            utility.axhline(sweep.raw.nn_task, color="#38a169", linestyle=":", label="10-NN task share, raw")
        utility.set_title("what is kept, and the cost")
        for axes in (leakage, utility):
            axes.set_xticks(positions, labels)
            axes.set_xlabel(f"{sweep.method}: {sweep.parameter}")
            axes.set_ylim(0, 1.05)
            if sweep.chosen is not None:
                axes.axvline(sweep.chosen, color="#2d3748", linewidth=4, alpha=0.15, label="chosen")
            axes.legend(loc="best", fontsize=7)

    return draw


def _probe_table(audit: AuditReport) -> str:
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


def _audit_thresholds_table(card: dict[str, Any]) -> str:
    head = "<tr><th>figure</th><th>what it means</th><th>warn at</th><th>alert at</th></tr>"
    rows = [
        f"<tr><td>{html.escape(figure)}</td><td>{html.escape(MEANINGS[figure])}</td><td>{band['warn']:g}</td>"
        f"<td>{band['alert']:g}</td></tr>"
        for figure, band in card_thresholds(card).to_dict().items()
    ]
    return f"<table>{head}{''.join(rows)}</table>"


def _ranking_table(audit: AuditReport) -> str:
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


def _table(rows: Sequence[tuple[str, str]]) -> str:
    cells = "".join(f"<tr><th>{html.escape(a)}</th><td>{html.escape(b)}</td></tr>" for a, b in rows)
    return f"<table>{cells}</table>"


def _figure(title: str, draw: Callable[[Figure], None] | None, size: tuple[float, float], missing: str) -> str:
    body = _svg(draw, size) if draw is not None else f'<p class="muted">{html.escape(missing)}</p>'
    return f'<h2>{html.escape(title)}</h2><figure class="plot">{body}</figure>'


def _capitalized(text: str) -> str:
    return text[:1].upper() + text[1:]


def _verdict_paragraph(title: str, verdict: Verdict) -> str:
    detail = _capitalized(verdict.sentence().split(": ", 1)[1])
    return (
        f'<p class="verdict verdict-{html.escape(verdict.status)}"><strong>{html.escape(title)}: '
        f"{html.escape(verdict.status)}</strong>. {html.escape(detail)}.</p>"
    )


def _fresh_audits(audits: Sequence[tuple[int, dict[str, Any]]]) -> str:
    if not audits:
        return (
            '<h2>Fresh audits</h2><p class="muted">None yet: <code>veil audit NAME VERSION --data FRESH</code> '
            "audits the version on a sample drawn after it and records the result beside it.</p>"
        )
    head = "<tr><th>#</th><th>when, by whom</th><th>data</th><th>rows</th><th>status</th><th>why</th></tr>"
    rows = []
    for number, body in audits:
        verdict = Verdict.from_dict(body["verdict"])
        data = body["data"]
        files = ", ".join(data["files"]) or "a sample"
        why = "; ".join(verdict.reasons) or "every judged figure below its warn level"
        rows.append(
            f"<tr><td>{number}</td><td>{html.escape(body['audited_at'])} by {html.escape(body['audited_by'])}</td>"
            f"<td>{html.escape(files)} (sha256 {html.escape(data['fingerprint_sha256'][:12])})</td>"
            f'<td>{data["audited_rows"]}</td><td class="verdict-{html.escape(verdict.status)}">'
            f"{html.escape(verdict.status)}</td><td>{html.escape(why)}</td></tr>"
        )
    return f"<h2>Fresh audits</h2><table>{head}{''.join(rows)}</table>"


def render_report(
    version_id: str,
    card: dict[str, Any],
    history: Sequence[dict[str, float]],
    plots: PlotData,
    audits: Sequence[tuple[int, dict[str, Any]]] = (),
) -> str:
    """The report page of one version, from its card, the eraser's iteration history and the plot data.

    ``audits`` are the version's fresh audits as ``(number, record body)``, oldest first.
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
    thresholds = [
        (figure, f"warn {band['warn']}, alert {band['alert']}") for figure, band in card["thresholds"].items()
    ]
    iterations_missing = f"{card['method']} is fitted in closed form: there are no iterations to plot."
    sections = [
        f"<h1>veil report: {html.escape(card['name'])} {html.escape(version_id)}</h1>",
        _verdict_paragraph("Verdict at fitting time", card_verdict(card)),
        *(
            [_verdict_paragraph(f"Latest fresh audit ({audits[-1][0]})", Verdict.from_dict(audits[-1][1]["verdict"]))]
            if audits
            else []
        ),
        f'<p class="muted">{html.escape(RULE)}</p>',
        f'<p class="caution">{html.escape(_CAUTION)}</p>',
        "<h2>Version</h2>" + _table(summary),
        _figure("Leakage before and after erasure", _leakage_plot(audit), (8, 3.6), ""),
        _probe_table(audit),
        attributes_section(card),
        _figure("Fitting iterations", _history_plot(card["method"], history), (7, 3.2), iterations_missing),
        _figure("Held-out embeddings, coloured by attribute", _scatter_plot(plots, classes), (11, 4.4), ""),
        _figure("Per-vector distortion", _distortion_plot(plots), (7, 3.2), ""),
        _figure("Retrieval: who the nearest neighbours are", _retrieval_plot(audit), (7, 3.4), "No retrieval figures."),
        _ranking_table(audit),
        _figure(
            "Operating points",
            _operating_points_plot(card.get("operating_points")),
            (11, 4.2),
            "No strength sweep was run for this version (veil fit --sweep, --target).",
        ),
        f"<h2>Full audit</h2><pre>{html.escape(audit.format_table())}</pre>",
        *(
            [f"<pre>{html.escape(chr(10).join(operating_points_text(card['operating_points'])))}</pre>"]
            if "operating_points" in card
            else []
        ),
        _fresh_audits(audits),
        "<h2>Audit thresholds</h2>" + _audit_thresholds_table(card),
        "<h2>Alert thresholds of the live checks</h2>" + _table(thresholds),
    ]
    notes = card.get("notes", [])
    if notes:
        sections.append("<h2>Notes</h2><ul>" + "".join(f"<li>{html.escape(n)}</li>" for n in notes) + "</ul>")
    title = html.escape(f"veil report {card['name']} {version_id}")
    return (
        f'<!DOCTYPE html><html lang="en"><head><meta charset="utf-8"><title>{title}</title>'
        f"<style>{_STYLE}</style></head><body>{''.join(sections)}</body></html>"
    )
