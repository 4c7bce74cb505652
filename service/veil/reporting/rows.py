"""The report's section on the rows a fit needs: the sentence, the measured points against the curve, a plot."""

from __future__ import annotations

import html

import numpy as np
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter

from veil.audit.report import AuditReport
from veil.audit.rows_curve import NOT_RECORDED, LearningCurve, RowsNeeded
from veil.reporting.plots import AFTER, BEFORE, WARN, Draw, svg

TITLE = "Rows needed"

EXPLAINED = (
    "A linear eraser removes the class-mean difference it estimated from its fitting rows; sampling error leaves "
    "part of the true one, readable on rows the fit never saw, and more fitting rows shrink it. The audit refitted "
    "the same method on 1/8, 1/4 and 1/2 of the fitting rows (nested, stratified, seeded draws), read each fit "
    "with the audit's linear reader on the same held-out rows (its accuracy above {baseline}), and fitted "
    "excess ≈ a · rows^-b through the four points, b between 1/2 and 1. The projection is conservative: where it "
    "was checked the excess fell faster than the curve as rows grew (docs/methods.md, Rows needed); the second "
    "figure is the other end, the excess falling like 1/rows from this fit on."
)


def _capitalized(text: str) -> str:
    """The first letter up, the rest as it is (a context column's name keeps its case)."""
    return text[:1].upper() + text[1:]


def _points(name: str, curve: LearningCurve) -> list[str]:
    return [
        f"<tr><td>{html.escape(name)}</td><td>{rows:,}</td><td>{excess:+.3f}</td><td>{curve.law(rows):.3f}</td></tr>"
        for rows, excess in zip(curve.rows, curve.excess, strict=True)
    ]


def curve_plot(record: RowsNeeded) -> Draw | None:
    """The measured excess at each row count and the fitted curve out to the projected rows (log-log axes)."""
    curves = [(name, curve) for name, curve in (("population", record.population), ("within the context",
              record.context)) if curve is not None]  # fmt: skip
    if not curves:
        return None

    def draw(figure: Figure) -> None:
        axes = figure.add_subplot()
        for (name, curve), colour in zip(curves, (AFTER, BEFORE), strict=False):
            # Out to the projection, but no farther than 64 times the fit: the projection of a flat curve is far off.
            end = min(max(curve.projected_rows, curve.rows[-1]) * 1.2, curve.rows[-1] * 64)
            grid = np.geomspace(curve.rows[0], end, 60)
            axes.plot(grid, [curve.law(n) for n in grid], color=colour, label=f"{name}: a·rows^-{curve.exponent:.2f}")
            kept = [(n, e) for n, e in zip(curve.rows, curve.excess, strict=True) if e > 0]
            axes.plot([n for n, _ in kept], [e for _, e in kept], "o", color=colour, label=f"{name}: measured")
        axes.axhline(curves[0][1].threshold, color=WARN, linestyle="--", label="warn level of the linear threat")
        axes.set_xscale("log")
        axes.set_yscale("log")
        # Plain numbers on the log axes (0.05, 2,000), not powers of ten: they are read against the sentence.
        axes.xaxis.set_major_formatter(FuncFormatter(lambda value, _: f"{value:,.0f}"))
        # Minor ticks labelled at 2, 3 and 5 of each decade only, so their labels do not run into each other.
        axes.yaxis.set_major_formatter(FuncFormatter(lambda value, _: f"{value:.2g}"))
        axes.yaxis.set_minor_formatter(
            FuncFormatter(lambda value, _: f"{value:.2g}" if f"{value:.0e}"[0] in "235" else "")
        )
        axes.set_xlabel("fitting rows")
        axes.set_ylabel("held-out linear excess")
        axes.legend(fontsize=8)

    return draw


def rows_section(audit: AuditReport) -> str:
    """The section: what the audit projects, or why it was not measured (an older version: not recorded)."""
    record = audit.rows_needed
    head = f"<h2>{TITLE}</h2>"
    if record is None:
        return f'{head}<p class="muted">{html.escape(_capitalized(NOT_RECORDED))}.</p>'
    if record.population is None:
        return f'{head}<p class="muted">Not measured: {html.escape(record.reason or "no reason recorded")}.</p>'
    sentences = "".join(f"<p><strong>{html.escape(_capitalized(s))}.</strong></p>" for s in record.sentences())
    baseline = "majority" + (", and within the context above the floor" if record.context is not None else "")
    rows = _points("population", record.population)
    if record.context is not None:
        rows += _points("within the context", record.context)
    table = (
        "<table><tr><th>curve</th><th>fitting rows</th><th>held-out excess, measured</th><th>curve</th></tr>"
        + "".join(rows)
        + "</table>"
    )
    cost = f"Read on {record.heldout:,} held-out rows; the refits and their readers took {record.seconds:.1f} s."
    plot = curve_plot(record)
    figure = "" if plot is None else f'<figure class="plot">{svg(plot, (7, 3.4))}</figure>'
    text = EXPLAINED.format(baseline=baseline) + " " + cost
    return f'{head}{sentences}<p class="muted">{html.escape(text)}</p>{table}{figure}'
