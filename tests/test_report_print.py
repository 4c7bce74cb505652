"""The report an auditor reads: verdicts first, every figure explained, live checks over time; it prints uncut.

Rendered in real headless Chromium (to a DOM and to a PDF), the PDF's pages
turned into text and PNG with poppler's pdftotext and pdftoppm.  CI installs
both (``.ci/run``) and sets ``VEIL_REQUIRE_BROWSER=1``, so there a missing
tool fails these tests instead of skipping them.
"""

from __future__ import annotations

import html
import json
import os
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from matplotlib import image
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure

from veil.patrol.rounds import patrol_round
from veil.registry import Registry
from veil.registry.card import card_audit
from veil.reporting.plots import retrieval_plot, timeline_plot

from .test_cli import run
from .test_fresh_audit import _population, _save
from .test_report_render import chromium

T0 = 1_800_000_000.0


def _poppler(tool: str) -> str:
    found = shutil.which(tool)
    if found is None:
        if os.environ.get("VEIL_REQUIRE_BROWSER"):
            pytest.fail(f"{tool} is not installed (poppler-utils), and VEIL_REQUIRE_BROWSER is set")
        pytest.skip(f"{tool} is not installed (apt-get install poppler-utils)")
    return found


@pytest.fixture(scope="module")
def report(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Registry, str]:
    """A version with a fresh audit and a day of recorded live checks that turn to alert halfway, and its report."""
    folder = tmp_path_factory.mktemp("printed")
    registry_path = folder / "registry"
    fitted = run(
        "fit", "--data", _save(folder / "fit.npz", *_population(1)), "--attribute", "region", "--task", "task",
        "--method", "leace", "--name", "planted", "--registry", registry_path,
    )  # fmt: skip
    assert fitted.code == 0, fitted.err
    version = fitted.out.strip().splitlines()[-1]
    audited = run(
        "audit", "planted", "1", "--data", _save(folder / "march.npz", *_population(2)), "--attribute", "region",
        "--task", "task", "--registry", registry_path,
    )  # fmt: skip
    assert audited.code == 0, audited.err
    registry = Registry(registry_path)
    for hour in range(24):
        drifted = hour >= 12
        answer = {
            "version": version, "rows": 2048, "status": "alert" if drifted else "ok",
            "reasons": ["mean_shift 1.700 reaches alert (1.0)"] if drifted else [],
            "leakage_gap": 0.01, "mean_shift": 1.7 if drifted else 0.2, "covariance_shift": 0.1,
            "erased_variance_ratio": 1.1, "prior_shift": 0.02,
        }  # fmt: skip
        patrol_round(
            registry, "planted", lambda name, sample, answer=answer: answer, service="http://veil", sample=None,
            every=3600.0, now=T0 + 3600 * hour,
        )  # fmt: skip
    page = folder / "report.html"
    assert run("report", "planted", "1", "--registry", registry_path, "--out", page).code == 0
    return page, registry, version


def test_the_page_opens_with_the_verdicts_and_explains_every_figure(
    report: tuple[Path, Registry, str], tmp_path: Path
) -> None:
    page, registry, version = report
    dom = chromium("--dump-dom", page.as_uri(), profile=tmp_path / "profile").stdout
    # The verdicts come before anything else: one sentence naming each piece of evidence and its status, then
    # each verdict in plain words with the figures it judged and their levels, then the rule in one sentence.
    assert dom.index('<section class="headline"') < dom.index("<h2>")
    lede = re.search(r'<p class="lede">(.*?)</p>', dom)
    assert lede is not None
    assert re.fullmatch(
        rf"On planted {version}, the audit at fitting time is <b>ok</b>, fresh audit 1, the latest, is "
        r"<b>(ok|warn|alert)</b>, and the latest live check, at 2027-01-16 07:00 UTC, is <b>alert</b>\.",
        lede[1],
    )
    assert "<strong>Audit at fitting time: ok</strong>" in dom
    assert re.search(r"<strong>Latest fresh audit \(1\): (ok|warn|alert)</strong>", dom)
    # The live check's figures as the record holds them; the one at alert first, in bold, with its levels.
    assert "<strong>Latest live check (2027-01-16 07:00 UTC): alert</strong>" in dom
    assert "Figures judged: <b>mean_shift 1.700 (warn 0.5, alert 1): alert</b> · leakage_gap 0.010" in dom
    # Each status is a shape as well as a word (and a colour), so it reads in greyscale too.
    assert dom.count('<span class="shape" aria-hidden="true">■</span>') >= 2
    assert "The rule: each figure is compared with the warn and alert levels" in dom
    # Every figure of the audit has a row with its meaning and chance level: as many rows as the card's audit has.
    expected = len(card_audit(dict(registry.read_version("planted", version).card)).figure_rows())
    cells = r"<td>(.*?)</td>"
    rows = re.findall(rf'<tr data-figure="([a-z_0-9]+)">{cells}{cells}{cells}{cells}{cells}</tr>', dom)
    assert len(rows) == expected >= 20
    assert all(chance and meaning for *_, chance, meaning in rows)
    assert {key for key, *_ in rows} >= {"majority", "accuracy", "balanced", "recall", "gap", "nn_attribute", "task"}
    # The live checks over time: one plot of five panels with the thresholds drawn, and the latest checks listed.
    assert "<h2>Live checks over time</h2><figure" in dom
    assert "24 checks from 2027-01-15 08:00 UTC to 2027-01-16 07:00 UTC: 12 ok, 0 warn, 12 alert" in dom
    assert "warn 0.5" in dom  # the mean shift's warn level, drawn and labelled
    # The timeline, leakage, rows needed, retrieval, embeddings and distortion (LEACE has no iterations; no sweep
    # ran).
    assert dom.count('<figure class="plot"><svg') == 6
    for heading in (
        "Fresh audits",
        "Every figure, and what it means",
        "Probes",
        "Ranking fairness",
        "Audit thresholds",
    ):
        assert f"<h2>{heading}</h2>" in dom
    assert "no legal or compliance guarantee" in dom


class _Blocks(HTMLParser):
    """The words of each table and each plot of a page, in order, and how often each word occurs on the page."""

    def __init__(self) -> None:
        super().__init__()
        self.blocks: list[tuple[str, list[str]]] = []
        self.counts: dict[str, int] = {}
        self._open: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        if tag in ("table", "figure") and not self._open:
            self.blocks.append((tag, []))
        if tag in ("table", "figure"):
            self._open.append(tag)

    def handle_endtag(self, tag: str) -> None:
        if tag in ("table", "figure") and self._open:
            self._open.pop()

    def handle_data(self, data: str) -> None:
        for word in data.split():
            self.counts[word] = self.counts.get(word, 0) + 1
        if self._open:
            self.blocks[-1][1].extend(data.split())


def _page_texts(pdf: Path, pages: int) -> list[set[str]]:
    texts = []
    for number in range(1, pages + 1):
        text = subprocess.run(
            [_poppler("pdftotext"), "-f", str(number), "-l", str(number), str(pdf), "-"],
            capture_output=True, text=True, check=True,
        ).stdout  # fmt: skip
        texts.append(set(text.split()))
    return texts


def _print(page: Path, tmp_path: Path) -> tuple[Path, list[set[str]]]:
    """The page printed to PDF by Chromium, and the words on each of its pages (pdftotext)."""
    pdf = tmp_path / f"{page.stem}.pdf"
    chromium("--no-pdf-header-footer", f"--print-to-pdf={pdf}", page.as_uri(), profile=tmp_path / "profile")
    info = subprocess.run([_poppler("pdfinfo"), str(pdf)], capture_output=True, text=True, check=True).stdout
    pages = re.search(r"Pages:\s+(\d+)", info)
    assert pages is not None
    return pdf, _page_texts(pdf, int(pages[1]))


def _cut_blocks(page: Path, words_on: list[set[str]]) -> tuple[list[str], int]:
    """Tables and plots of ``page`` that run across printed pages, and how many blocks could be judged.

    A word that occurs once on the page and is printed on one page only marks where its block sits: a block's
    first and last such words share a page unless a page break cut the block.
    """
    blocks = _Blocks()
    blocks.feed(page.read_text())
    cut, judged = [], 0
    for kind, words in blocks.blocks:
        once = [word for word in words if len(word) >= 5 and blocks.counts[word] == 1]
        placed = [(word, [n for n, text in enumerate(words_on) if word in text]) for word in once]
        marks = [(word, found[0]) for word, found in placed if len(found) == 1]
        if len(marks) < 2:
            continue
        judged += 1
        if marks[0][1] != marks[-1][1]:
            cut.append(f"a {kind} from page {marks[0][1] + 1} ({marks[0][0]!r}) to page {marks[-1][1] + 1}")
    return cut, judged


def test_it_prints_with_no_plot_or_table_cut_across_pages(report: tuple[Path, Registry, str], tmp_path: Path) -> None:
    page, _, _ = report
    pdf, words_on = _print(page, tmp_path)
    assert len(words_on) >= 3
    cut, judged = _cut_blocks(page, words_on)
    assert cut == []
    assert judged >= 10  # most tables and plots carry words printed nowhere else, so the check has teeth
    # A printed page shows its plots drawn: the second page, as PNG, holds the live-check timeline (the first
    # the headline and the version).
    subprocess.run(
        [_poppler("pdftoppm"), "-png", "-r", "80", "-f", "1", "-l", "2", str(pdf), str(tmp_path / "page")], check=True
    )
    first, second = (image.imread(png)[..., :3] for png in sorted(tmp_path.glob("page-*.png")))
    for pixels in (first, second):
        assert np.mean(pixels.mean(axis=2) < 0.9) > 0.03  # ink: text, table rules, plot lines
    # The timeline's warn lines are the only ink of this orange (the headline's shapes use other colours).
    warn_orange = np.mean(np.abs(second - np.array([0xDD, 0x6B, 0x20]) / 255).max(axis=2) < 0.08)
    assert warn_orange > 0.00003  # measured 0.00009 of the page at 80 dpi
    assert np.mean(np.abs(first - np.array([0xDD, 0x6B, 0x20]) / 255).max(axis=2) < 0.08) == 0
    if os.environ.get("VEIL_KEEP_SCREENSHOT"):
        image.imsave(os.environ["VEIL_KEEP_SCREENSHOT"], second)


def test_the_cut_check_finds_a_cut(report: tuple[Path, Registry, str], tmp_path: Path) -> None:
    # The same page without the print rules that keep blocks whole, and with a table taller than a page.
    page, _, _ = report
    text = page.read_text().replace("break-inside: avoid;", "")
    filler = "".join(f"<tr><td>row{i:03d}marker</td></tr>" for i in range(120))
    broken = tmp_path / "broken.html"
    broken.write_text(text.replace("<h2>Fresh audits</h2>", f"<table>{filler}</table><h2>Fresh audits</h2>", 1))
    _, words_on = _print(broken, tmp_path)
    cut, _ = _cut_blocks(broken, words_on)
    assert any("'row000marker'" in description for description in cut)


# Measures, in the browser, every box of the page at the width it is shown: a box whose content is wider than
# the box (and so hidden or scrolled away), and a box reaching past the window's right edge.
_MEASURE = """<script>(() => {
  const width = document.documentElement.clientWidth;
  const found = {width: width, page: document.documentElement.scrollWidth, clipped: [], beyond: []};
  for (const box of document.querySelectorAll('body *')) {
    if (box.closest('svg')) continue;
    const what = box.tagName.toLowerCase() + ': ' + box.textContent.trim().slice(0, 50);
    const hides = getComputedStyle(box).overflowX !== 'visible';
    if (hides && box.scrollWidth > box.clientWidth + 1) found.clipped.push(what);
    if (box.getBoundingClientRect().right > width + 1) found.beyond.push(what);
  }
  const out = document.createElement('output');
  out.id = 'measured';
  out.textContent = JSON.stringify(found);
  document.body.appendChild(out);
})();</script>"""


def _layout(page: Path, tmp_path: Path, width: int, extra_style: str = "") -> dict:
    """What :data:`_MEASURE` finds on ``page`` shown in a window ``width`` px wide (``extra_style`` added)."""
    probe = tmp_path / f"measured-{width}.html"
    text = page.read_text().replace("</style>", extra_style + "</style>", 1)
    probe.write_text(text.replace("</body>", _MEASURE + "</body>", 1))
    dom = chromium(
        "--hide-scrollbars", f"--window-size={width},900", "--dump-dom", probe.as_uri(), profile=tmp_path / "profile"
    ).stdout
    found = re.search(r'<output id="measured">(.*?)</output>', dom, re.S)
    assert found is not None
    return json.loads(html.unescape(found[1]))


def test_no_text_is_cut_off_on_screen(report: tuple[Path, Registry, str], tmp_path: Path) -> None:
    # A common laptop window's width (common practice for checking a page's layout).
    page, _, _ = report
    width = 1280
    found = _layout(page, tmp_path, width)
    assert found["width"] == width
    # Nothing wider than the window, and no box (the full audit's text above all) hiding what does not fit.
    assert found["page"] <= width
    assert found["beyond"] == []
    assert found["clipped"] == []


def test_the_layout_check_finds_a_cut_off_block(report: tuple[Path, Registry, str], tmp_path: Path) -> None:
    # The full audit's lines kept unwrapped in a box that scrolls, as the page had them before.
    page, _, _ = report
    found = _layout(page, tmp_path, 1280, "pre { white-space: pre !important; overflow-x: auto; }")
    assert any(what.startswith("pre: ") for what in found["clipped"])


_LONG_LINE = " ".join(f"edge{i:03d}" for i in range(60)) + " " + "unbroken" * 30


def _printed_words(page: Path, tmp_path: Path, extra_style: str = "") -> str:
    """The printed text of ``page`` with a long line added to its full audit, all whitespace removed."""
    text = page.read_text().replace("</style>", extra_style + "</style>", 1)
    marked = tmp_path / "marked.html"
    marked.write_text(text.replace("<h2>Full audit</h2><pre>", f"<h2>Full audit</h2><pre>{_LONG_LINE}\n", 1))
    _, words_on = _print(marked, tmp_path)
    pdf = tmp_path / "marked.pdf"
    printed = subprocess.run([_poppler("pdftotext"), str(pdf), "-"], capture_output=True, text=True, check=True)
    assert len(words_on) >= 3
    return "".join(printed.stdout.split())


def test_the_full_audit_wraps_within_the_printed_page(report: tuple[Path, Registry, str], tmp_path: Path) -> None:
    # A line far wider than the page, of words and of one word without a break: printed whole, it wraps.
    # (pdftotext leaves out what a page cuts off at its edge: the check below finds that, see the next test.)
    page, _, _ = report
    printed = _printed_words(page, tmp_path)
    assert "".join(_LONG_LINE.split()) in printed


def test_the_print_check_finds_text_cut_at_the_page_edge(report: tuple[Path, Registry, str], tmp_path: Path) -> None:
    page, _, _ = report
    printed = _printed_words(page, tmp_path, "pre { white-space: pre !important; overflow-wrap: normal !important; }")
    assert "edge000" in printed
    assert "edge059" not in printed


def test_the_live_check_axis_reads_utc_dates_and_times(report: tuple[Path, Registry, str]) -> None:
    _, registry, version = report
    card = dict(registry.read_version("planted", version).card)

    def labels(moments: list[str]) -> tuple[set[str], set[str]]:
        checks = [{"checked_at": moment, "report": {"mean_shift": 0.1}} for moment in moments]
        draw = timeline_plot(checks, card["thresholds"])
        assert draw is not None
        figure = Figure(figsize=(12, 3))
        draw(figure)
        FigureCanvasAgg(figure).draw()
        axes = figure.axes
        ticks = {text.get_text() for panel in axes for text in panel.get_xticklabels() if text.get_text()}
        return ticks, {panel.get_xlabel() for panel in axes}

    # One check, and checks seconds apart (an offset other than UTC too): hours and minutes in UTC, the date below.
    for moments in (
        ["2027-01-15T08:33:03+00:00"],
        ["2027-01-15T08:33:03+00:00", "2027-01-15T08:33:05+00:00", "2027-01-15T10:33:07+02:00"],
    ):
        ticks, names = labels(moments)
        assert ticks
        assert all(re.fullmatch(r"\d\d:\d\d", tick) for tick in ticks), ticks
        assert names == {"UTC, 2027-01-15"}
    # Across midnight, both dates; over weeks, dates on the ticks.
    ticks, names = labels(["2027-01-15T20:00:00+00:00", "2027-01-16T04:00:00+00:00"])
    assert names == {"UTC, 2027-01-15 to 2027-01-16"}
    ticks, names = labels(["2027-01-01T00:00:00+00:00", "2027-01-29T00:00:00+00:00"])
    assert ticks
    assert all(re.fullmatch(r"2027-01-\d\d", tick) for tick in ticks), ticks
    assert names == {"UTC"}


def test_the_retrieval_legend_covers_no_bar(report: tuple[Path, Registry, str]) -> None:
    _, registry, version = report
    draw = retrieval_plot(card_audit(dict(registry.read_version("planted", version).card)))
    assert draw is not None
    figure = Figure(figsize=(8.4, 3.4))
    draw(figure)
    canvas = FigureCanvasAgg(figure)
    figure.tight_layout()
    canvas.draw()
    renderer = canvas.get_renderer()
    (axes,) = figure.axes
    legend = axes.get_legend()
    assert legend is not None
    box = legend.get_window_extent(renderer)
    bars = [patch.get_window_extent(renderer) for patch in axes.patches]
    assert len(bars) == 4  # before and after, for the attribute and the task
    assert not any(box.overlaps(bar) for bar in bars)
    # And the legend stays on the figure.
    assert figure.bbox.contains(box.x0, box.y0)
    assert figure.bbox.contains(box.x1, box.y1)
