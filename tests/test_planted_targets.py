"""The targets reached on planted linear, quadratic and sub-population signals, checked again on a fresh sample.

The data carry a binary attribute in three ways at once: a mean shift (linear), a class-dependent spread
(quadratic: equal means along that direction) and a shift confined to a tenth of the rows (a sub-population),
beside a four-cluster task the attribute does not decide.  ``veil fit --sweep --target`` must store a version that
meets every target of the project's erasure issue; a fresh sample drawn from the same distribution, cleaned by the
stored version and read by scikit-learn's own classifiers, must agree.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from numpy.typing import NDArray
from sklearn.ensemble import HistGradientBoostingClassifier
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import StratifiedKFold, cross_val_score
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from veil.audit.points import Sweep
from veil.registry import Registry

from .test_cli import run

TARGETS = (
    "linear <= majority + 0.03",
    "strongest <= majority + 0.1",
    "nn-attribute <= base + 0.05",
    "task >= raw - 0.02",
    "nn-task >= raw",
)


def _planted(draw_seed: int, n: int = 4000, d: int = 24) -> tuple[NDArray[np.float64], NDArray[np.intp], NDArray]:
    """Rows of one fixed distribution (its structure from seed 0); ``draw_seed`` draws the rows."""
    structure = np.random.default_rng(0)
    centers = structure.normal(size=(4, d)) * 1.2
    centers[:, :2] = 0.0  # the task's clusters stay out of the coordinates that carry the attribute
    rotation = np.linalg.qr(structure.normal(size=(d, d)))[0]
    rng = np.random.default_rng(draw_seed)
    z = rng.integers(0, 2, n)
    task = rng.integers(0, 4, n)
    x = rng.normal(size=(n, d)) + centers[task]
    sign = 2 * z - 1
    x[:, 0] += 1.5 * sign  # linear: the class means differ
    x[:, 1] *= np.where(z == 1, 2.0, 0.6)  # quadratic: equal means, different spread
    group = rng.random(n) < 0.1
    x[group, 2] += 6.0  # a sub-population apart from the rest...
    x[group, 3] += 2.5 * sign[group]  # ...in which alone the attribute shifts another coordinate
    return x @ rotation, z.astype(np.intp), task


def _read(x: NDArray[np.float64], labels: NDArray[np.intp], reader: object) -> float:
    folds = StratifiedKFold(n_splits=5, shuffle=True, random_state=0)
    return float(np.mean(cross_val_score(reader, x, labels, cv=folds)))  # type: ignore[arg-type]


@pytest.fixture(scope="module")
def sample(tmp_path_factory: pytest.TempPathFactory) -> Path:
    x, z, task = _planted(draw_seed=1)
    path = tmp_path_factory.mktemp("planted") / "planted.npz"
    np.savez(path, embedding=x.astype(np.float32), group=np.array(["a", "b"])[z], task=np.array(list("pqrs"))[task])
    return path


@pytest.mark.parametrize(
    ("method", "options", "values"),
    [("transport", ("--option", "then_leace=true"), "8,all"), ("leace", (), "0,2,4")],
)
def test_a_swept_version_meets_every_target_and_a_fresh_sample_agrees(
    sample: Path, tmp_path: Path, method: str, options: tuple[str, ...], values: str
) -> None:
    registry = tmp_path / "r"
    targets = [argument for text in TARGETS for argument in ("--target", text)]
    result = run(
        "fit", "--data", sample, "--attribute", "group", "--task", "task", "--method", method, *options,
        "--name", "planted", "--registry", registry, "--sweep", values, *targets,
    )  # fmt: skip
    assert result.code == 0, result.err
    version = result.out.strip().splitlines()[-1]
    stored = Registry(registry).read_version("planted", version)
    sweep = Sweep.from_dict(stored.card["operating_points"])
    # The signals are there to remove: the raw rows miss the strongest-reader and neighbourhood targets by far.
    assert sweep.raw.strongest > sweep.baselines.majority + 0.3
    assert sweep.raw.nn_attribute > 0.7
    if method == "leace":
        # LEACE alone (k = 0) removes the linear signal only and misses the targets that the other two feed.
        plain = sweep.points[0]
        assert plain.linear <= sweep.baselines.majority + 0.03
        assert plain.strongest > sweep.baselines.majority + 0.1
        assert sweep.chosen != 0

    # A fresh sample of the same distribution, cleaned by the stored version and read by scikit-learn's readers.
    x, z, _ = _planted(draw_seed=2)
    cleaned = stored.artifact.apply(x.astype(np.float32)).astype(np.float64)
    majority = float(np.bincount(z).max() / z.size)
    linear = make_pipeline(StandardScaler(), LogisticRegression(max_iter=1000))
    trees = HistGradientBoostingClassifier(random_state=0)
    assert _read(x, z, trees) > majority + 0.3
    # Slack of 0.02 for the fresh sample's own sampling error (4,000 rows: a standard error of about 0.008).  Measured:
    # linear 0.529 / 0.532 and trees 0.557 / 0.579 after transport / LEACE with two directions, majority 0.506.
    assert _read(cleaned, z, linear) <= majority + 0.03 + 0.02
    assert _read(cleaned, z, trees) <= majority + 0.10 + 0.02
