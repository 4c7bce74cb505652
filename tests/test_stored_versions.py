"""Versions written by an older release stay readable: cards record method keys, never class names."""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest

from veil.registry import Registry

from .test_cli import run
from .tolerances import apply_bound, assert_same_answer

FIXTURE = Path(__file__).parent / "fixtures" / "registry_0_1"
VERSIONS = {"v0001": "leace", "v0002": "inlp"}


@pytest.fixture
def registry_path(tmp_path: Path) -> Path:
    # A copy: a registry takes a lock file on writes, and the committed files must never change.
    return Path(shutil.copytree(FIXTURE / "registry", tmp_path / "registry"))


def test_versions_of_the_older_release_verify_and_apply_as_they_did(registry_path: Path) -> None:
    registry = Registry(registry_path)
    assert all(result.ok for result in registry.verify("legacy"))
    x = np.load(FIXTURE / "sample.npz")["embedding"]
    with np.load(FIXTURE / "expected.npz") as expected:
        for number, method in VERSIONS.items():
            stored = registry.read_version("legacy", number)
            assert stored.card["method"] == method
            assert stored.artifact.method == method
            # The expected answers were computed by the older release, perhaps with another BLAS or thread
            # count: both are within the float32 round-off bound of the exact map (tests/tolerances.py).
            bound = apply_bound(stored.artifact, x, x.dtype)
            assert_same_answer(stored.artifact.apply(x), expected[number], bound, number)


def test_aliases_and_history_of_the_older_release_read_back(registry_path: Path) -> None:
    registry = Registry(registry_path)
    assert registry.resolve("legacy", "live").startswith("v0001-")
    assert [event.action for event in registry.history("legacy")] == ["promote", "promote", "rollback"]
    shown = run("show", "legacy", "live", "--registry", str(registry_path))
    assert shown.code == 0
    assert "leace" in shown.out


def test_cards_of_the_older_release_show_and_render_with_todays_probe_figures(
    registry_path: Path, tmp_path: Path
) -> None:
    # Those cards hold the linear probe only, without per-class recall or the probe protocol.
    for number in VERSIONS:
        shown = run("show", "legacy", number, "--registry", str(registry_path))
        assert shown.code == 0, shown.err
        assert "not recorded (the card was written before the audit recorded its protocol)" in shown.out
        # Three classes of `region`: the balanced accuracy's chance level comes from the card's classes.
        assert "linear probe balanced accuracy (chance 0.333)" in shown.out
        assert "strongest probe" not in shown.out  # one probe ran: there is nothing to rank
        # Written before verdicts and claims: judged by the defaults on every figure, and said so.
        assert "  rule: judged on every figure (the card was written before versions claimed" in shown.out
        page = tmp_path / f"{number}.html"
        rendered = run("report", "legacy", number, "--out", str(page), "--registry", str(registry_path))
        assert rendered.code == 0, rendered.err
        text = page.read_text()
        assert "<td>linear probe</td>" in text
        assert "balanced accuracy after (chance 0.333)" in text
        assert text.count("<td>not recorded</td>") == 3
