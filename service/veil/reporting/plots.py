"""The report's plots, each a function that draws on a matplotlib figure, and their rendering as inline SVG."""

from __future__ import annotations

import io
from collections.abc import Callable, Sequence
from datetime import UTC, datetime, timedelta
from typing import Any

import matplotlib

matplotlib.use("Agg")  # no display on servers; must precede pyplot
import matplotlib.pyplot as plt
import numpy as np
from matplotlib import dates
from matplotlib.axes import Axes
from matplotlib.figure import Figure

from veil.audit.points import Sweep, value_text
from veil.audit.report import PROBE_LABELS, AuditReport, ProbeScore
from veil.checks.thresholds import Band
from veil.reporting.plotdata import PlotData

Draw = Callable[[Figure], None]
BEFORE, AFTER, ALERT, WARN = "#8a94a6", "#2b6cb0", "#c53030", "#dd6b20"


def svg(draw: Draw, size: tuple[float, float]) -> str:
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


def leakage_plot(audit: AuditReport) -> Draw:
    pairs = [
        (PROBE_LABELS[name].removesuffix(" probe"), before, after) for name, before, after in audit.leakage.probes()
    ]

    def draw(figure: Figure) -> None:
        axes = figure.add_subplot()
        majority = None
        for index, (_, before, after) in enumerate(pairs):
            for offset, score, colour, when in ((-0.18, before, BEFORE, "before"), (0.18, after, AFTER, "after")):
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
        # Beside the axes: with five probes, bars fill every corner inside them.  (A continuous attribute's
        # regression probes have no bars here.)
        if axes.get_legend_handles_labels()[0]:
            axes.legend(loc="center left", bbox_to_anchor=(1.01, 0.5))

    return draw


def history_plot(method: str, history: Sequence[dict[str, float]]) -> Draw | None:
    if not history:
        return None
    steps = [h["iteration"] + 1 for h in history]

    def draw(figure: Figure) -> None:
        axes = figure.add_subplot()
        if method == "inlp":
            axes.plot(steps, [h["accuracy"] for h in history], marker="o", color=AFTER, label="classifier accuracy")
            axes.plot(steps, [h["majority"] for h in history], linestyle="--", color="#c53030", label="majority")
            axes.set_xlabel("INLP iteration (classifier removed)")
            axes.set_ylabel("validation accuracy")
        else:
            axes.plot(steps, [h["loss"] for h in history], color=AFTER, linewidth=1, label="classifier loss")
            # Versions stored before the histories carried it have no target line.
            if "prior_entropy" in history[0]:
                target = [h["prior_entropy"] for h in history]
                axes.plot(steps, target, linestyle="--", color="#c53030", label="prior entropy (nothing learned)")
            axes.set_xlabel("R-LACE iteration")
            axes.set_ylabel("adversary cross-entropy (higher = less leakage)")
        axes.legend(loc="best")

    return draw


def scatter_plot(plots: PlotData, classes: Sequence[str]) -> Draw:
    """The held-out rows on their two leading principal axes, before and after, coloured by class (if any)."""

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
            if not classes:  # a version of continuous attributes only: no classes to colour the rows by
                axes.scatter(points[:, 0], points[:, 1], s=6, alpha=0.6, color=AFTER, label="rows (no classes)")
            axes.set_title(f"held-out rows {title}: leading two principal axes")
            axes.set_xlabel("PC 1")
            axes.set_ylabel("PC 2")
            axes.legend(loc="best", markerscale=2)

    return draw


def distortion_plot(plots: PlotData) -> Draw:
    def draw(figure: Figure) -> None:
        axes = figure.add_subplot()
        axes.hist(plots.distortion, bins=50, color=AFTER)
        mean = float(np.mean(plots.distortion))
        axes.axvline(mean, color="#c53030", linestyle="--", linewidth=1, label=f"mean {mean:.4f}")
        axes.set_xlabel("‖x' − x‖² / E‖x − μ‖² per held-out vector")
        axes.set_ylabel("vectors")
        axes.legend()

    return draw


def retrieval_plot(audit: AuditReport) -> Draw | None:
    rt = audit.retrieval
    if rt is None:
        return None
    groups = [("attribute", rt.attribute_share_before, rt.attribute_share_after, rt.attribute_base_rate)]
    if rt.task_share_before is not None and rt.task_share_after is not None and rt.task_base_rate is not None:
        groups.append(("task", rt.task_share_before, rt.task_share_after, rt.task_base_rate))

    def draw(figure: Figure) -> None:
        axes = figure.add_subplot()
        for index, (_, before, after, base) in enumerate(groups):
            axes.bar(index - 0.18, before, width=0.34, color=BEFORE, label="before" if index == 0 else None)
            axes.bar(index + 0.18, after, width=0.34, color=AFTER, label="after" if index == 0 else None)
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
        # Beside the axes, as in the leakage plot: inside, any corner can hold a bar that reaches it.
        axes.legend(loc="center left", bbox_to_anchor=(1.01, 0.5))

    return draw


def operating_points_plot(record: dict[str, Any] | None) -> Draw | None:
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
        leakage.plot(positions, series("linear"), marker="o", color=AFTER, label="linear probe")
        leakage.plot(positions, series("strongest"), marker="s", color="#805ad5", label="strongest probe")
        leakage.plot(positions, series("nn_attribute"), marker="^", color="#dd6b20", label="10-NN attribute share")
        leakage.axhline(sweep.baselines.majority, color="#c53030", linestyle="--", label="majority")
        leakage.axhline(sweep.baselines.nn_attribute_base, color="#dd6b20", linestyle=":", label="10-NN base rate")
        leakage.set_title("what is left of the attribute (lower is better)")
        utility.plot(positions, series("distortion"), marker="o", color=BEFORE, label="distortion")
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


#: The live checks' figures the timeline draws, with their axis labels.
LIVE_FIGURES = {
    "leakage_gap": "leakage gap (probe vs majority)",
    "mean_shift": "mean shift (whitened, beyond noise)",
    "covariance_shift": "covariance shift (beyond noise)",
    "erased_variance_ratio": "variance in erased directions (× fit)",
    "prior_shift": "class-share shift (total variation)",
}
#: Each status drawn in its own colour and its own shape, so it reads without colour too (and in greyscale print).
STATUS_MARKS = {"ok": ("#2f855a", "o"), "warn": (WARN, "^"), "alert": (ALERT, "s")}
#: The narrowest time axis drawn: a single check, or checks seconds apart, still get hour-and-minute ticks.
SHORTEST_SPAN = timedelta(hours=1)


def check_times(checks: Sequence[dict[str, Any]]) -> list[datetime]:
    """When each check ran, in UTC (records hold ISO times with an offset; one without is taken as UTC)."""
    times = [datetime.fromisoformat(check["checked_at"]) for check in checks]
    return [(t if t.tzinfo is not None else t.replace(tzinfo=UTC)).astimezone(UTC) for t in times]


def time_axis(axes: Axes, times: Sequence[datetime]) -> None:
    """A UTC date-and-time axis over ``times``: a few ticks, never finer than minutes.

    Within a day the ticks read hours and minutes, and the axis label the date (or both dates, across
    midnight); over longer spans the ticks read dates.  A span shorter than :data:`SHORTEST_SPAN` is widened
    around its middle so the ticks never reach seconds.
    """
    first, last = min(times), max(times)
    span = max(last - first, SHORTEST_SPAN)
    middle = first + (last - first) / 2
    # matplotlib's date helpers carry no annotations: each call below is typed by hand.
    axes.set_xlim(middle - span * 0.55, middle + span * 0.55)  # type: ignore[arg-type]
    locator = dates.AutoDateLocator(tz=UTC, minticks=2, maxticks=4)  # type: ignore[no-untyped-call]
    axes.xaxis.set_major_locator(locator)
    within_a_day = span <= timedelta(days=1)
    pattern = "%H:%M" if within_a_day else "%Y-%m-%d"
    axes.xaxis.set_major_formatter(dates.DateFormatter(pattern, tz=UTC))  # type: ignore[no-untyped-call]
    if within_a_day:
        days = sorted({first.date().isoformat(), last.date().isoformat()})
        axes.set_xlabel("UTC, " + " to ".join(days), fontsize=7)
    else:
        axes.tick_params(axis="x", labelrotation=30)
        axes.set_xlabel("UTC", fontsize=7)
    axes.tick_params(axis="x", labelsize=7)


def timeline_plot(checks: Sequence[dict[str, Any]], thresholds: dict[str, dict[str, float]]) -> Draw | None:
    """Each live-check figure over time (one panel each), with the card's warn and alert levels drawn.

    ``checks`` are the bodies of the version's check records, in the order they were checked.
    """
    if not checks:
        return None
    times = check_times(checks)

    def draw(figure: Figure) -> None:
        panels = figure.subplots(1, len(LIVE_FIGURES), sharex=True)
        for axes, (name, label) in zip(panels, LIVE_FIGURES.items(), strict=True):
            values = [check["report"].get(name) for check in checks]
            shown = [(when, float(value)) for when, value in zip(times, values, strict=True) if value is not None]
            band = thresholds.get(name)
            if band is not None:
                axes.axhline(band["warn"], color=WARN, linestyle="--", linewidth=1, label=f"warn {band['warn']:g}")
                axes.axhline(band["alert"], color=ALERT, linestyle=":", linewidth=1.2, label=f"alert {band['alert']:g}")
            if shown:
                when, value = zip(*shown, strict=True)
                levels = ["ok" if band is None else Band(band["warn"], band["alert"]).level(v) for v in value]
                axes.plot(when, value, color="#4a5568", linewidth=1)
                for status, (colour, marker) in STATUS_MARKS.items():
                    picked = [point for point, level in zip(shown, levels, strict=True) if level == status]
                    if picked:
                        at, level_values = zip(*picked, strict=True)
                        axes.scatter(at, level_values, s=16, zorder=3, color=colour, marker=marker)
            else:
                axes.text(0.5, 0.5, "not measured\n(no labels)", ha="center", va="center", transform=axes.transAxes)
            axes.set_title(label, fontsize=8)
            time_axis(axes, times)
            axes.set_ylim(bottom=0)
            axes.legend(loc="best", fontsize=6)

    return draw
