"""``make demo`` runs the whole path end to end (in a scratch folder, as a fresh clone would)."""

from __future__ import annotations

import re
import subprocess
import sys
from pathlib import Path


def test_the_demo_fits_serves_searches_checks_drift_and_rolls_back(tmp_path: Path) -> None:
    result = subprocess.run(
        [sys.executable, "-m", "veil.demo"], cwd=tmp_path, capture_output=True, text=True, timeout=600, check=False
    )
    assert result.returncode == 0, result.stderr
    out = result.stdout
    first, second = re.findall(r"stored (v0001-\w+) \(LEACE, live\) and (v0002-\w+)", out)[0]
    # The first version's verdicts: at fitting time, and on the March sign-ups, recorded beside it.
    assert re.search(r"verdict at fitting time: (ok|warn|alert)", out)
    assert re.search(rf"fresh audit 1 of profiles-minilm {first}, on the 600 profiles that signed up in March: ", out)
    assert (tmp_path / "demo-registry" / "profiles-minilm" / "records" / first / "audits").is_dir()
    assert f"cleaned 3000 profiles through the client in batches of 512 with {second}" in out
    assert re.search(r"a normal sample \(400, unlabelled\):\s+ok", out)
    assert re.search(r"the same sample, shifted:\s+alert", out)
    # Each says which rule judged it: the demo's versions store their no-drift draws, so the calibrated levels.
    assert len(re.findall(r"judged by calibrated levels: p-values against the version's own no-drift draws", out)) == 2
    assert f"the service now answers with {first}" in out
    # faiss through search vectors on the raw index and the index veil apply rebuilt hold the same profiles, with
    # the promoted version and with the rolled-back one (results tied within round-off may trade places at the edge).
    assert f"both with {second}; the same 10 profiles for" in out
    assert f"new index built with veil apply ({first})" in out
    same = [int(count) for count in re.findall(r"the same 10 profiles for (\d+) of 300 queries", out)]
    assert len(same) == 2
    assert min(same) >= 297
    # The pronoun and the age bracket guarded together, with their intersection: figures, checks and counterfactuals
    # per attribute.
    joint = re.findall(r"stored (v0001-\w+) \(LEACE, rank (\d+), linear probes only\)", out)
    assert joint
    assert int(joint[0][1]) == 5  # 1 + 2 directions for the two attributes, 2 more for the intersection
    for attribute, kind in (
        ("pronoun", "categorical"),
        ("age_bracket", "categorical"),
        ("pronoun&age_bracket", "joint"),
    ):
        assert re.search(rf"  {re.escape(attribute)} \({kind}, 1919 fitting rows\): linear probe ", out)
        assert re.search(rf"     {re.escape(attribute)}: prior shift \d\.\d+, leakage gap", out)
    assert f"5 profiles as 'she, over 50' with {joint[0][0]}" in out
    assert "service stopped cleanly" in out
    # The rolled-back version's live check, recorded as a scheduled patrol would, and its auditor's report.
    assert re.search(rf"profiles-minilm {first}: (ok|warn|alert) by calibrated levels.*, recorded as check 1", out)
    report = (tmp_path / "demo-report.html").read_text()
    assert "Latest fresh audit (1)" in report
    assert "Latest live check (" in report
    for version in (first, second):
        assert (tmp_path / "demo-registry" / "profiles-minilm" / "versions" / version / "report.html").is_file()
