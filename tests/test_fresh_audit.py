"""Fresh audits of stored versions (``veil audit``): the verdict, the record beside the version, its integrity."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest
from numpy.typing import NDArray

from veil.registry import Registry

from .test_cli import run, snapshot

DIM = 12


def _population(draw_seed: int, n: int = 2000, shifted: bool = False) -> tuple[NDArray[np.float64], NDArray, NDArray]:
    """One fixed population (its structure from seed 0): the attribute shifts the class means along one direction.

    ``shifted`` draws from a later population in which the attribute also moves a second direction that the
    fitting population never showed it in, the kind of change a fresh audit is there to catch.
    """
    structure = np.random.default_rng(0)
    mixing = structure.normal(size=(DIM, DIM)) / np.sqrt(DIM)
    signal, new_signal, task_signal = structure.normal(size=(3, DIM))
    rng = np.random.default_rng(draw_seed)
    z = rng.integers(0, 2, n)
    task = rng.integers(0, 2, n)  # a task the attribute does not decide
    x = rng.normal(size=(n, DIM)) @ mixing + np.outer(z, signal) + 1.5 * np.outer(task, task_signal)
    if shifted:
        x += np.outer(z, new_signal)
    return x, np.array(["north", "south"])[z], np.array(["down", "up"])[task]


def _save(path: Path, x: NDArray[np.float64], z: NDArray, task: NDArray) -> Path:
    np.savez(path, embedding=x.astype(np.float32), region=z, task=task)
    return path


@pytest.fixture(scope="module")
def fitted(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str, Path]:
    """A registry with one LEACE version of the population, and its folder."""
    folder = tmp_path_factory.mktemp("fresh")
    data = _save(folder / "fit.npz", *_population(draw_seed=1))
    # Written here, not by the test that reads it first: under several workers that test may run elsewhere.
    _save(folder / "same.npz", *_population(draw_seed=2))
    registry = folder / "registry"
    result = run(
        "fit", "--data", data, "--attribute", "region", "--task", "task", "--method", "leace", "--name", "planted",
        "--registry", registry, "--holdout", "0.5",
    )  # fmt: skip
    assert result.code == 0, result.err
    return registry, result.out.strip().splitlines()[-1], folder


def _audit(registry: Path, data: Path, *extra: str) -> dict:
    result = run(
        "audit", "planted", "1", "--data", data, "--attribute", "region", "--task", "task", "--registry", registry,
        "--json", *extra,
    )  # fmt: skip
    assert result.code == 0, result.err
    return json.loads(result.out)


def test_the_same_population_keeps_the_fitting_verdict_and_a_shifted_one_gets_a_worse_one(
    fitted: tuple[Path, str, Path],
) -> None:
    registry, version, folder = fitted
    card = Registry(registry).read_version("planted", version).card
    # LEACE on a mean shift: no probe reads the attribute after it on the held-out rows (LEACE's theorem).
    assert card["verdict"]["status"] == "ok", card["verdict"]
    same = _audit(registry, folder / "same.npz")
    assert same["verdict"]["status"] == card["verdict"]["status"]
    # A fresh audit is judged on the threats the card claims: LEACE's, linear readers.
    assert same["verdict"]["claimed"] == card["claims"] == ["linear"]
    shifted = _audit(registry, _save(folder / "shifted.npz", *_population(draw_seed=3, shifted=True)))
    assert shifted["verdict"]["status"] == "alert"
    # The linear probe reads the new direction (scikit-learn's logistic regression, 5-fold on the fresh rows).
    linear = shifted["audit"]["leakage"]["linear_after"]
    assert linear["interval_low"] - linear["majority"] >= 0.05
    assert any("linear probe" in reason for reason in shifted["verdict"]["reasons"])
    assert shifted["audit"]["protocol"]["scheme"] == "k-fold cross-validation within a fresh sample"
    assert shifted["data"]["audited_rows"] == 2000
    # Listed by `veil show`, in order, in text and JSON.
    shown = json.loads(run("show", "planted", "1", "--registry", registry, "--json").out)
    assert [audit["number"] for audit in shown["fresh_audits"]] == [1, 2]
    assert [audit["verdict"]["status"] for audit in shown["fresh_audits"]] == ["ok", "alert"]
    text = run("show", "planted", "1", "--registry", registry).out
    assert "verdict at fitting time: ok: every figure of the claimed threats (linear readers) and of the task" in text
    assert "  2. " in text
    assert "shifted.npz" in text
    # The report opens with both verdicts and lists the fresh audits.
    page_path = folder / "report.html"
    assert run("report", "planted", "1", "--registry", registry, "--out", page_path).code == 0
    page = page_path.read_text()
    assert '<li class="status-ok"><span class="shape" aria-hidden="true">○</span>' in page
    assert "<strong>Audit at fitting time: ok</strong>" in page
    assert "<strong>Latest fresh audit (2): alert</strong>" in page
    assert page.index("Audit at fitting time") < page.index("<h2>Version</h2>")
    assert page.count('<td class="status">') == 2


def test_records_leave_the_version_alone_are_idempotent_and_verified(
    fitted: tuple[Path, str, Path], tmp_path: Path
) -> None:
    registry, version, _ = fitted
    before = snapshot(registry / "planted" / "versions")
    data = _save(tmp_path / "again.npz", *_population(draw_seed=4))
    first = _audit(registry, data, "--probes", "linear")
    again = _audit(registry, data, "--probes", "linear")
    assert again == first  # the same data audited the same way: the stored record, not a second one
    records = Registry(registry).records("planted", version, "audits")
    assert sum(record.key == first["key"] for record in records) == 1
    # The version's own files (and so its content hash) are untouched; verify passes with the records.
    assert snapshot(registry / "planted" / "versions") == before
    assert run("verify", "--registry", registry).code == 0
    # A writer killed between its temporary file and the link leaves a stray file that is no record.
    directory = registry / "planted" / "records" / version / "audits"
    (directory / f".{first['number']:08d}-{'0' * 16}.json.x1y2.tmp").write_text("{")
    assert len(Registry(registry).records("planted", version, "audits")) == len(records)
    # A changed record is found by verify and refused by show, naming it (in a copy: the fixture is shared).
    shutil.copytree(registry, tmp_path / "copy")
    registry = tmp_path / "copy"
    directory = registry / "planted" / "records" / version / "audits"
    path = directory / f"{first['number']:08d}-{first['key']}.json"
    stored = json.loads(path.read_text())
    stored["body"]["verdict"]["status"] = "ok" if stored["body"]["verdict"]["status"] != "ok" else "alert"
    path.write_text(json.dumps(stored))
    verified = run("verify", "--registry", registry)
    assert verified.code == 1
    assert f"audits record {path.name} does not match its sha256" in verified.out + verified.err
    shown = run("show", "planted", "1", "--registry", registry)
    assert shown.code == 1
    assert path.name in shown.err
    # A damaged record does not stop new evidence from being recorded beside it.
    later = _audit(registry, _save(tmp_path / "later.npz", *_population(draw_seed=6)), "--probes", "linear")
    assert later["number"] == len(records) + 1


def test_audit_thresholds_given_at_fitting_time_judge_the_fresh_audits(fitted: tuple[Path, str, Path]) -> None:
    _, _, folder = fitted
    registry = folder / "strict"
    result = run(
        "fit", "--data", folder / "fit.npz", "--attribute", "region", "--task", "task", "--method", "leace",
        "--name", "planted", "--registry", registry, "--probes", "linear",
        "--audit-threshold", "task_loss=0,0", "--audit-threshold", "neighbour-excess=0.5,0.9",
    )  # fmt: skip
    assert result.code == 0, result.err
    card = Registry(registry).read_version("planted", "1").card
    bands = card["verdict"]["thresholds"]
    assert bands["task_loss"] == {"warn": 0.0, "alert": 0.0}
    assert bands["neighbour_excess"] == {"warn": 0.5, "alert": 0.9}
    assert bands["linear_gap"] == {"warn": 0.02, "alert": 0.05}  # left at its default
    # A band of zero alerts on any figure at or above it, task loss 0 included.
    assert card["verdict"]["status"] == "alert"
    fresh = _audit(registry, folder / "same.npz", "--probes", "linear")
    assert fresh["verdict"]["thresholds"] == bands
    assert fresh["verdict"]["status"] == "alert"


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (("--audit-threshold", "task_loss=0.1"), "does not read as FIGURE=WARN,ALERT"),
        (("--audit-threshold", "recall=0.1,0.2"), "unknown threshold 'recall'"),
        (("--audit-threshold", "task_loss=0.2,0.1"), "needs 0 <= warn <= alert"),
    ],
)
def test_bad_thresholds_are_refused_by_name(
    fitted: tuple[Path, str, Path], argv: tuple[str, ...], message: str
) -> None:
    registry, _, folder = fitted
    result = run(
        "fit", "--data", folder / "fit.npz", "--attribute", "region", "--method", "leace", "--name", "other",
        "--registry", registry, *argv,
    )  # fmt: skip
    assert result.code == 2
    assert message in result.err
    assert not (registry / "other").exists()


def test_what_cannot_be_audited_is_refused_with_one_line(fitted: tuple[Path, str, Path], tmp_path: Path) -> None:
    registry, _, folder = fitted
    x, z, task = _population(draw_seed=5, n=200)
    wide = _save(tmp_path / "wide.npz", np.hstack([x, x]), z, task)
    single = _save(tmp_path / "single.npz", x, np.full(200, "north"), task)
    for version, data, message in (
        ("1", folder / "fit.npz", "is the sample planted v0001"),
        ("1", wide, "the sample has 24 dimensions and planted v0001"),
        ("1", single, "holds one class of 'region'"),
        ("7", folder / "same.npz", "no version with sequence number 7"),
    ):
        result = run("audit", "planted", version, "--data", data, "--attribute", "region", "--registry", registry)
        assert result.code == 2, result.err
        assert message in result.err
        assert len(result.err.strip().splitlines()) == 1


def test_a_streamed_fresh_sample_is_read_in_chunks_and_drawn_by_hash(
    fitted: tuple[Path, str, Path], tmp_path: Path
) -> None:
    registry, _, _ = fitted
    x, z, task = _population(draw_seed=8)
    np.save(tmp_path / "march.npy", x.astype(np.float32))
    rows = "\n".join(f"{a},{b}" for a, b in zip(z, task, strict=True))
    (tmp_path / "march.csv").write_text(f"region,task\n{rows}\n")
    audited = _audit(
        registry, tmp_path / "march.npy", "--labels", str(tmp_path / "march.csv"), "--stream", "--chunk-rows", "500",
        "--rows", "600", "--probes", "linear",
    )  # fmt: skip
    # About 600 of 2,000 rows, drawn by a hash of each row's index (600 is its expectation, not a quota).
    assert 500 < audited["data"]["audited_rows"] < 700
    assert audited["data"]["rows"] == 2000
    assert f"audited on a hash-drawn sample of {audited['data']['audited_rows']} of the 2000 rows" in audited["notes"]


def test_an_attribute_the_version_does_not_guard_is_refused_and_show_names_each_audits_attribute(
    fitted: tuple[Path, str, Path], tmp_path: Path
) -> None:
    registry, version, _ = fitted
    x, z, _ = _population(draw_seed=9)
    data = tmp_path / "two-columns.npz"
    np.savez(data, embedding=x.astype(np.float32), region=z, reshuffled=np.random.default_rng(0).permutation(z))
    before = Registry(registry).records("planted", "1", "audits")
    refused = run("audit", "planted", "1", "--data", data, "--attribute", "reshuffled", "--registry", registry)
    assert refused.code == 2
    assert f"planted {version} guards 'region', not 'reshuffled'" in refused.err
    assert len(Registry(registry).records("planted", "1", "audits")) == len(before)  # nothing was recorded
    audited = run(
        "audit", "planted", "1", "--data", data, "--attribute", "region", "--registry", registry, "--probes", "linear"
    )
    assert audited.code == 0, audited.err
    shown = run("show", "planted", "1", "--registry", registry).out
    listed = [line for line in shown.splitlines() if line.startswith("  ") and " rows of " in line]
    assert listed
    assert all(": region on " in line for line in listed)


@pytest.mark.parametrize("level", [None, "warn", "alert"])
def test_fail_on_gates_a_ci_job_on_the_fresh_audits_verdict(
    fitted: tuple[Path, str, Path], tmp_path: Path, level: str | None
) -> None:
    registry, _, _ = fitted
    # A shifted population: the attribute also moves a direction the fit never saw, so the audit does not pass.
    data = _save(tmp_path / "shifted.npz", *_population(draw_seed=11, shifted=True))
    gate = () if level is None else ("--fail-on", level)
    result = run(
        "audit", "planted", "1", "--data", data, "--attribute", "region", "--registry", registry, "--probes",
        "linear", *gate,
    )  # fmt: skip
    status = result.out.split("verdict: ", 1)[1].split(":", 1)[0]
    assert status in ("warn", "alert"), result.out
    reached = level is not None and ("ok", "warn", "alert").index(status) >= ("ok", "warn", "alert").index(level)
    assert result.code == (3 if reached else 0)
    assert ("at or above --fail-on" in result.err) == reached
    assert "fresh audit" in result.out  # stored (or found stored) all the same
