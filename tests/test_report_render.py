"""The HTML report renders in a real browser (headless Chromium) with all its plots.

CI installs Debian's ``chromium`` and sets ``VEIL_REQUIRE_BROWSER=1``, so
there a missing browser fails the test instead of skipping it.
"""

from __future__ import annotations

import os
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from matplotlib import image

from veil.fitting.job import fit_version
from veil.fitting.request import FitRequest, MethodSpec, StoreSpec
from veil.registry import Registry
from veil.reporting import REPORT_FILE
from veil.samples.harbourline import load_harbourline_profiles
from veil.samples.sources import LabelledSample

BROWSER = shutil.which("chromium") or shutil.which("chromium-browser")
# The flags a sandboxed, offline machine needs: no sandbox as root, no GPU, no background connections.
FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
]
PLOT_BLUE = np.array([0x2B, 0x6C, 0xB0]) / 255


@pytest.fixture(scope="module")
def report_page(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("report")
    profiles = load_harbourline_profiles()
    sample = LabelledSample(
        embeddings=profiles.embedding,
        attribute=profiles.pronoun,
        attribute_key="pronoun",
        task=profiles.field,
        task_key="field",
        files={"harbourline": "0" * 64},
    )
    registry = Registry(folder / "registry")
    outcome = fit_version(
        sample,
        FitRequest(MethodSpec("inlp", params={"classifier": "moments", "max_iter": 15}), StoreSpec("profiles-minilm")),
        registry=registry,
    )
    page = folder / "report.html"
    page.write_bytes(registry.read_version("profiles-minilm", outcome.version_id).files[REPORT_FILE])
    return page


def chromium(*args: str, profile: Path) -> subprocess.CompletedProcess[str]:
    if BROWSER is None:
        if os.environ.get("VEIL_REQUIRE_BROWSER"):
            pytest.fail("chromium is not installed, and VEIL_REQUIRE_BROWSER is set")
        pytest.skip("chromium is not installed (apt-get install chromium)")
    return subprocess.run(
        [BROWSER, *FLAGS, f"--user-data-dir={profile}", *args],
        capture_output=True,
        text=True,
        timeout=120,
        check=True,
    )


def test_the_rendered_page_has_every_plot(report_page: Path, tmp_path: Path) -> None:
    dom = chromium("--dump-dom", report_page.as_uri(), profile=tmp_path / "profile").stdout
    assert dom.count('<figure class="plot"><svg') == 5
    assert "veil report: profiles-minilm v0001-" in dom
    for heading in ("Leakage before and after erasure", "Probes", "Fitting iterations", "Per-vector distortion"):
        assert heading in dom
    # Every probe's row in the probe table, one of them marked strongest, with per-class recall and chance.
    for probe in ("linear probe", "quadratic probe", "RBF kernel probe", "boosted-trees probe", "MLP probe"):
        assert f"<td>{probe}" in dom
    assert dom.count('<tr class="strongest">') == 1
    assert "balanced accuracy after (chance 0.500)" in dom
    assert "recall after: he" in dom
    assert "recall after: she" in dom
    assert "trained and tested only on the 610 held-out rows the eraser never saw" in dom


def test_the_screenshot_shows_drawn_plots(report_page: Path, tmp_path: Path) -> None:
    shot = tmp_path / "report.png"
    chromium(
        f"--screenshot={shot}",
        "--window-size=1200,4200",
        "--hide-scrollbars",
        report_page.as_uri(),
        profile=tmp_path / "p",
    )
    pixels = image.imread(shot)[..., :3]
    assert pixels.shape[:2] == (4200, 1200)
    ink = np.mean(pixels.mean(axis=2) < 0.9)
    # A blank or unstyled page has almost no ink; the plots' bars, points and lines give plenty.
    assert ink > 0.03
    blue = np.mean(np.abs(pixels - PLOT_BLUE).max(axis=2) < 0.08)
    assert blue > 0.002
    if os.environ.get("VEIL_KEEP_SCREENSHOT"):
        shutil.copy(shot, os.environ["VEIL_KEEP_SCREENSHOT"])
