"""The report an auditor reads: verdicts first, every figure explained, live checks over time; it prints uncut.

Rendered in real headless Chromium (to a DOM and to a PDF), the PDF's pages
turned into text and PNG with poppler's pdftotext and pdftoppm.  CI installs
both (``.ci/run``) and sets ``VEIL_REQUIRE_BROWSER=1``, so there a missing
tool fails these tests instead of skipping them.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from matplotlib import image

from veil.patrol.rounds import patrol_round
from veil.registry import Registry
from veil.registry.card import card_audit

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
    # The verdicts come before anything else, in plain words, with the rule in one sentence.
    first = dom.index('<p class="verdict')
    assert first < dom.index("<h2>")
    assert "<strong>Verdict at fitting time: ok</strong>" in dom
    assert re.search(r"<strong>Latest fresh audit \(1\): (ok|warn|alert)</strong>", dom)
    assert "<strong>Latest live check (2027-01-16T07:00:00+00:00): alert</strong>" in dom
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
    assert "24 checks from 2027-01-15T08:00:00+00:00 to 2027-01-16T07:00:00+00:00: 12 ok, 0 warn, 12 alert" in dom
    assert "warn 0.5" in dom  # the mean shift's warn level, drawn and labelled
    # The timeline, leakage, retrieval, embeddings and distortion (LEACE has no iterations; no sweep ran).
    assert dom.count('<figure class="plot"><svg') == 5
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
    # A printed page shows its plots drawn: the first page, as PNG, holds the live-check timeline.
    subprocess.run(
        [_poppler("pdftoppm"), "-png", "-r", "80", "-f", "1", "-l", "1", str(pdf), str(tmp_path / "page")], check=True
    )
    (first,) = tmp_path.glob("page-*1.png")
    pixels = image.imread(first)[..., :3]
    assert np.mean(pixels.mean(axis=2) < 0.9) > 0.03  # ink: text, table rules, plot lines
    # The timeline's warn lines are the only ink of this orange (verdict boxes use other colours).
    warn_orange = np.mean(np.abs(pixels - np.array([0xDD, 0x6B, 0x20]) / 255).max(axis=2) < 0.08)
    assert warn_orange > 0.00003  # measured 0.00016 of the page at 80 dpi
    if os.environ.get("VEIL_KEEP_SCREENSHOT"):
        shutil.copy(first, os.environ["VEIL_KEEP_SCREENSHOT"])


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
