"""Strength sweeps: the points measured on held-out rows, the targets that choose one, the card and the report."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from veil.audit.points import Baselines, PointFigures, Sweep
from veil.errors import DataError
from veil.fitting.sweep import parse_target
from veil.registry import Registry

from .conftest import planted
from .test_cli import run

BASE = Baselines(majority=0.5, nn_attribute_base=0.5, nn_task_base=0.2)
RAW = PointFigures(
    linear=0.99, strongest=0.99, strongest_probe="mlp", nn_attribute=0.9, task=0.95, nn_task=0.6, distortion=0.0
)


def point(**figures: float) -> PointFigures:
    values = {**RAW.to_dict(), **figures}
    return PointFigures.from_dict(values)


@pytest.mark.parametrize(
    ("text", "figure_value", "met"),
    [
        ("linear <= majority + 0.03", {"linear": 0.53}, True),
        ("linear <= majority + 0.03", {"linear": 0.531}, False),
        ("nn-attribute <= base + 0.05", {"nn_attribute": 0.55}, True),
        ("task >= raw - 0.02", {"task": 0.93}, True),
        ("task >= raw - 0.02", {"task": 0.92}, False),
        ("nn-task >= raw", {"nn_task": 0.61}, True),
        ("distortion <= 0.2", {"distortion": 0.21}, False),
        ("STRONGEST <= MAJORITY + 0.1", {"strongest": 0.6}, True),
    ],
)
def test_a_target_reads_its_figure_against_its_reference(text: str, figure_value: dict[str, float], met: bool) -> None:
    # Worked by hand: majority 0.5, nn-attribute base 0.5, raw task 0.95 and raw 10-NN task share 0.6.
    assert (parse_target(text).miss(point(**figure_value), RAW, BASE) == 0.0) is met


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("linear < majority", "does not read as"),
        ("recall <= majority", "unknown figure"),
        ("linear <= base", "is not compared with base"),
        ("task <= majority", "is not compared with majority"),
        ("linear <= median", "unknown reference"),
    ],
)
def test_a_target_that_cannot_be_read_is_refused_by_name(text: str, message: str) -> None:
    with pytest.raises(DataError, match=message):
        parse_target(text)


@pytest.fixture(scope="module")
def sample(tmp_path_factory: pytest.TempPathFactory) -> Path:
    x, z = planted(n=3000, d=12, seed=4)
    rng = np.random.default_rng(4)
    # A task the attribute does not decide: the first coordinate's sign, plus noise.
    task = np.where(x[:, 0] + 0.5 * rng.normal(size=x.shape[0]) > 0, "up", "down")
    path = tmp_path_factory.mktemp("sweep") / "planted.npz"
    np.savez(path, embedding=x.astype(np.float32), region=np.array(["north", "south"])[z], task=task)
    return path


def test_targets_store_the_point_of_least_distortion_that_meets_them(sample: Path, tmp_path: Path) -> None:
    registry = tmp_path / "r"
    result = run(
        "fit", "--data", sample, "--attribute", "region", "--task", "task", "--method", "rlace", "--name", "planted",
        "--registry", registry, "--sweep", "1,2,4", "--target", "linear <= majority + 0.1",
        "--target", "task >= raw - 0.1", "--probes", "linear", "--option", "max_iter=60",
    )  # fmt: skip
    assert result.code == 0, result.err
    version = result.out.strip().splitlines()[-1]
    card = Registry(registry).read_version("planted", version).card
    record = card["operating_points"]
    sweep = Sweep.from_dict(record)
    assert (sweep.parameter, sweep.values) == ("rank", (1, 2, 4))
    assert sweep.chosen is not None
    # The stored eraser is the chosen point's, with the chosen strength among its parameters.
    assert card["params"]["rank"] == sweep.values[sweep.chosen]
    chosen = sweep.points[sweep.chosen]
    targets = [parse_target(text) for text in sweep.targets]
    assert all(target.miss(chosen, sweep.raw, sweep.baselines) == 0 for target in targets)
    # No point that moves the data less meets every target (the rule, checked from the recorded figures).
    for other in sweep.points:
        if other.distortion < chosen.distortion:
            assert any(target.miss(other, sweep.raw, sweep.baselines) > 0 for target in targets)
    # The audit of the stored version measures the same map on the same rows as the chosen point.
    assert card["audit"]["leakage"]["linear_after"]["accuracy"] == pytest.approx(chosen.linear)
    shown = run("show", "planted", version, "--registry", registry)
    assert "operating points: rlace over rank" in shown.out
    assert "<- chosen" in shown.out
    report = run("report", "planted", version, "--registry", registry, "--out", tmp_path / "report.html")
    assert report.code == 0
    page = (tmp_path / "report.html").read_text()
    assert "<h2>Operating points</h2><figure" in page
    assert page.count("<svg") >= 6


def test_targets_no_point_meets_write_nothing_and_show_the_points(sample: Path, tmp_path: Path) -> None:
    registry = tmp_path / "r"
    result = run(
        "fit", "--data", sample, "--attribute", "region", "--method", "transport", "--name", "planted",
        "--registry", registry, "--sweep", "2,all", "--target", "distortion <= 0", "--probes", "linear",
    )  # fmt: skip
    assert result.code == 2
    assert result.err.startswith("veil fit: no transport point of the sweep over rank meets every target")
    assert "distortion <= 0" in result.err
    assert "<- chosen" not in result.out
    assert "  all  " in result.out
    assert not (registry / "planted").exists()


def test_a_sweep_without_targets_stores_the_configured_fit_and_records_the_curves(sample: Path, tmp_path: Path) -> None:
    registry = tmp_path / "r"
    result = run(
        "fit", "--data", sample, "--attribute", "region", "--method", "inlp", "--name", "planted",
        "--registry", registry, "--sweep", "--probes", "linear", "--option", "classifier=moments",
    )  # fmt: skip
    assert result.code == 0, result.err
    card = json.loads(run("show", "planted", "1", "--registry", registry, "--json").out)
    record = card["operating_points"]
    assert record["parameter"] == "max_iter"
    assert record["values"] == [1, 2, 4, 8, 16, 32]
    assert record["chosen"] is None
    assert card["params"]["max_iter"] == 20  # INLP's default, as configured


def test_what_cannot_be_swept_is_refused_before_any_work(sample: Path, tmp_path: Path) -> None:
    for argv, message in (
        (("--method", "meanproj", "--sweep"), "meanproj has no strength to sweep"),
        (("--method", "transport", "--sweep", "8,x"), "--sweep values are whole numbers or 'all'"),
        (("--method", "transport", "--sweep", "0,8"), "needs rank of at least 1, got 0"),
        (("--method", "rlace", "--sweep", "1,all"), "'all' has no meaning"),
        (("--method", "transport", "--target", "nn-attr <= base"), "unknown figure"),
    ):
        result = run("fit", "--data", sample, "--attribute", "region", "--name", "p", "--registry", tmp_path, *argv)
        assert result.code == 2
        assert message in result.err


def test_a_leace_sweep_over_second_moment_directions_accumulates_what_its_points_need(
    sample: Path, tmp_path: Path
) -> None:
    # The configured LEACE needs no per-class co-moments; the sweep's points with k > 0 do, and every point is fitted
    # from the moments of the job's one pass over the sample, so that pass must gather them.
    registry = tmp_path / "r"
    result = run(
        "fit", "--data", sample, "--attribute", "region", "--task", "task", "--name", "planted",
        "--registry", registry, "--method", "leace", "--sweep", "0,2,4", "--probes", "linear",
    )  # fmt: skip
    assert result.code == 0, result.err
    card = json.loads(run("show", "planted", "1", "--registry", registry, "--json").out)
    sweep = Sweep.from_dict(card["operating_points"])
    assert (sweep.parameter, sweep.values) == ("covariance_directions", (0, 2, 4))
    distortions = [point.distortion for point in sweep.points]
    # Each added direction removes more of the data: the distortion grows with k.
    assert distortions[0] < distortions[1] < distortions[2]
    assert card["params"]["covariance_directions"] == 0  # no targets: the configured fit is stored
    # The point k = 0 is plain LEACE, measured on the same rows as the stored version's audit.
    assert card["audit"]["leakage"]["linear_after"]["accuracy"] == pytest.approx(sweep.points[0].linear)
