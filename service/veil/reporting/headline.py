"""The report's headline: what each piece of evidence on a version says, in plain words, with the figures behind it.

The words are the verdicts' own (:meth:`~veil.checks.verdict.Verdict.sentence`); this module only lays them
out.  One sentence names every piece of evidence and its status; below it, one entry per piece (the audit at
fitting time, the latest fresh audit, the latest live check) gives the verdict's sentence and each figure it
judged, with its value and its warn and alert levels.  A status is always a word beside a shape, never a colour
alone, so the headline reads the same in greyscale print and to a reader who does not tell the colours apart.
"""

from __future__ import annotations

import html
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime

from veil.checks.thresholds import Band
from veil.checks.verdict import LEVELS, Verdict

#: Each status's shape, drawn beside its word: an open circle, a triangle, a filled square.
SHAPES = {"ok": "○", "warn": "▲", "alert": "■"}

#: The headline's styles; the page's other styles live in :mod:`veil.reporting.html`.
STYLE = """
.headline { border-top: 3px solid #1d2430; border-bottom: 1px solid #1d2430; margin: 1em 0 1.4em; padding: .5em 0; }
.headline .lede { font-size: 1.15em; margin: .3em 0 .6em; }
.evidence { list-style: none; margin: 0; padding: 0; }
.evidence li { display: grid; grid-template-columns: 1.6em 1fr; padding: .45em 0; border-top: 1px dotted #aab2c0; }
.evidence .claim { margin: 0; } .evidence .judged { margin: .15em 0 0; font-size: 13px; color: #3c4656; }
.evidence .judged b { color: #1d2430; }
.shape { font-size: 1.05em; line-height: 1.4; }
.status-ok .shape { color: #2f855a; } .status-warn .shape { color: #b7791f; } .status-alert .shape { color: #c53030; }
.headline .rule { font-size: 13px; color: #5b6575; margin: .5em 0 0; }
td.status { white-space: nowrap; }
@media print { .headline { break-inside: avoid; } }
"""


@dataclass(frozen=True)
class Evidence:
    """One piece of evidence on a version: what it is, its verdict, and the levels the verdict was judged by.

    ``title`` heads its entry ("Latest fresh audit (2)"); ``phrase`` names it within the headline's
    sentence ("fresh audit 2, the latest").  ``bands`` maps each figure the verdict may judge to its
    ``{"warn": ..., "alert": ...}`` levels.
    """

    title: str
    phrase: str
    verdict: Verdict
    bands: Mapping[str, Mapping[str, float]]


def utc_text(moment: str) -> str:
    """An ISO time as a reader writes it, in UTC to the minute: ``2027-01-16 07:00 UTC``."""
    parsed = datetime.fromisoformat(moment)
    if parsed.tzinfo is None:  # records hold an offset; one without is taken as UTC
        parsed = parsed.replace(tzinfo=UTC)
    return parsed.astimezone(UTC).strftime("%Y-%m-%d %H:%M UTC")


def status_mark(status: str) -> str:
    """A status as a shape and a word (the shape hidden from screen readers: the word says it)."""
    shape = SHAPES.get(status, "?")
    return f'<span class="shape" aria-hidden="true">{shape}</span> {html.escape(status)}'


def judged_figures(evidence: Evidence) -> list[tuple[str, float, Mapping[str, float], str]]:
    """Each figure the verdict judged with its value, levels and level reached; those at alert first, then warn.

    Within a level the card's order is kept: the order never depends on how close two values are.
    """
    judged = [
        (name, float(value), evidence.bands[name])
        for name, value in evidence.verdict.figures.items()
        if value is not None and name in evidence.bands
    ]
    levelled = [(name, value, band, Band(band["warn"], band["alert"]).level(value)) for name, value, band in judged]
    return sorted(levelled, key=lambda item: -LEVELS.index(item[3]))


def _judged_text(evidence: Evidence) -> str:
    figures = judged_figures(evidence)
    if not figures:
        return ""
    parts = []
    for name, value, band, level in figures:
        text = html.escape(f"{name} {value:.3f} (warn {band['warn']:g}, alert {band['alert']:g})")
        parts.append(f"<b>{text}: {html.escape(level)}</b>" if level != "ok" else text)
    return f'<p class="judged">Figures judged: {" · ".join(parts)}.</p>'


def _capitalised(text: str) -> str:
    return text[:1].upper() + text[1:]


def evidence_item(evidence: Evidence) -> str:
    """One entry of the headline: the status as shape and word, the verdict's own sentence, the figures judged."""
    verdict = evidence.verdict
    status = html.escape(verdict.status)
    # The sentence opens with the status ("warn: ..."); the entry says the status already, in bold.
    detail = _capitalised(verdict.sentence().split(": ", 1)[-1])
    return (
        f'<li class="status-{status}"><span class="shape" aria-hidden="true">{SHAPES.get(verdict.status, "?")}'
        f'</span><div><p class="claim"><strong>{html.escape(evidence.title)}: {status}</strong>. '
        f"{html.escape(detail)}.</p>{_judged_text(evidence)}</div></li>"
    )


def lede(subject: str, evidence: Sequence[Evidence]) -> str:
    """The headline's one sentence: every piece of evidence on the version, each with its status."""
    said = [f"{html.escape(item.phrase)} is <b>{html.escape(item.verdict.status)}</b>" for item in evidence]
    if len(said) > 1:
        said[-1] = "and " + said[-1]
    joined = ", ".join(said) if len(said) > 2 else " ".join(said)
    return f'<p class="lede">On {html.escape(subject)}, {joined}.</p>'


def headline(subject: str, evidence: Sequence[Evidence], rule: str) -> str:
    """The headline section: the sentence, one entry per piece of evidence, and the rule that judged them."""
    items = "".join(evidence_item(item) for item in evidence)
    return (
        f'<section class="headline" aria-label="verdicts">{lede(subject, evidence)}'
        f'<ol class="evidence">{items}</ol><p class="rule">{html.escape(rule)}</p></section>'
    )
