"""Continuous attributes: LEACE with a continuous z, regression probes in the audit, bad input named.

References: LEACE's guarantee ``Cov(x', z) = 0`` on the fitting data holds
for any numeric ``z`` (Belrose et al., 2023); the regression probe's figures
against scikit-learn's ``RidgeCV``, ``r2_score`` and ``mean_absolute_error``
on the same folds; its bootstrap interval against the population R² of a
planted linear model (``var(signal) / (var(signal) + var(noise))``).
"""

from __future__ import annotations

import json
from pathlib import Path

import jsonschema
import numpy as np
import pytest
from fastapi.testclient import TestClient
from numpy.typing import NDArray
from sklearn.linear_model import LinearRegression, RidgeCV
from sklearn.metrics import mean_absolute_error, r2_score
from sklearn.model_selection import KFold, cross_val_predict
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from veil import LEACE, attribute_table
from veil.audit import audit
from veil.audit.probes import regression_score
from veil.checks.thresholds import AuditThresholds
from veil.checks.verdict import judge_audit
from veil.errors import DataError
from veil.fitting.job import fit_version
from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, StoreSpec
from veil.registry import Registry
from veil.registry.evidence import version_evidence
from veil.reporting import REPORT_FILE
from veil.samples.sources import load_labelled_sample
from veil.samples.splitting import holdout_mask
from veil_client import VeilClient, VeilClientError

from .service_fixtures import app_for

# A linear-probe fit of the ages, pointed at by the alias live.
LIVE_AGES = FitRequest(MethodSpec("leace"), StoreSpec("ages", alias="live"), audit=AuditSpec(nonlinear=False))


def _ages(n: int, seed: int = 0) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.str_]]:
    """Embeddings carrying age in years linearly, and times a random sign another coordinate holds.

    The second trace has no covariance with age (the sign has mean 0), so no
    linear eraser removes it, and only a reader of the two coordinates
    together (trees) can read age from it.
    """
    rng = np.random.default_rng(seed)
    age = rng.uniform(18, 80, n)
    gender = rng.choice(np.array(["f", "m"]), size=n)
    x = rng.normal(size=(n, 8))
    x[:, 0] += 0.05 * age
    sign = rng.choice(np.array([-1.0, 1.0]), size=n)
    x[:, 3] += sign * (age - 49) / 6
    x[:, 4] += 2.0 * sign
    x[:, 2] += 1.5 * (gender == "m")
    return x, age, gender


def test_leace_zeroes_the_covariance_with_a_continuous_attribute() -> None:
    x, age, _ = _ages(2000)
    erased = LEACE().fit(x, attribute_table({"age_years": age}, continuous=["age_years"])).transform(x)
    # Cov(x', z) = 0 on the fitting data (Belrose et al. 2023), to 1e-8 relative.
    before = (x - x.mean(0)).T @ (age - age.mean()) / age.size
    after = (erased - erased.mean(0)).T @ (age - age.mean()) / age.size
    assert np.linalg.norm(after) <= 1e-8 * np.linalg.norm(before)


def test_the_regression_probe_agrees_with_scikit_learn_on_the_same_folds() -> None:
    rng = np.random.default_rng(1)
    x = rng.normal(size=(800, 6))
    signal = x @ np.array([1.0, -0.5, 0.25, 0.0, 0.0, 0.0])
    # Population R² of the planted model: var(signal) / (var(signal) + var(noise)) = 1.3125 / 2.3125.
    target = (signal + rng.normal(size=800))[:, None]
    score = regression_score(x, target, folds=5, random_state=0)
    folds = KFold(n_splits=5, shuffle=True, random_state=0)
    ridge = make_pipeline(StandardScaler(), RidgeCV(alphas=np.logspace(-3, 3, 13)))
    predicted = cross_val_predict(ridge, x, target, cv=folds)
    assert score.r2 == pytest.approx(r2_score(target, predicted), abs=1e-9)
    assert score.mae == pytest.approx(mean_absolute_error(target, predicted), abs=1e-9)
    baseline = np.empty_like(target)
    for train, test in folds.split(x):
        baseline[test] = target[train].mean()
    assert score.mae_baseline == pytest.approx(mean_absolute_error(target, baseline), abs=1e-12)
    assert score.r2_low is not None
    assert score.r2_high is not None
    assert score.mae_low is not None
    assert score.mae_high is not None
    assert score.r2_low < score.r2 < score.r2_high
    assert score.r2_low < 1.3125 / 2.3125 < score.r2_high
    assert score.mae_low < score.mae < score.mae_high < score.mae_baseline


def test_the_audit_of_a_continuous_attribute_reads_what_linear_erasure_leaves() -> None:
    x, age, _ = _ages(1500, seed=2)
    fitted, held = slice(0, 1000), slice(1000, None)
    eraser = LEACE().fit(x[fitted], attribute_table({"age_years": age[fitted]}, continuous=["age_years"]))
    report = audit(eraser, x[held], age[held, None], folds=5, random_state=0)
    linear_before, linear_after = report.leakage.linear_before, report.leakage.linear_after
    trees_after = report.leakage.trees_after
    assert linear_before.r2 > 0.4
    # The ridge probe reads (almost) nothing after LEACE; the boosted trees still read the signed trace.
    assert linear_after.r2 < 0.05
    assert trees_after is not None
    assert trees_after.r2 > 0.3
    verdict = judge_audit(report, AuditThresholds())
    assert verdict.status == "alert"
    assert any("explains at least" in reason and "boosted-trees" in reason for reason in verdict.reasons)
    assert "mean absolute error" in report.format_table()


def _write(folder: Path, n: int, age: NDArray[np.float64] | None = None) -> Path:
    x, ages, gender = _ages(n, seed=3)
    path = folder / "ages.npz"
    np.savez(path, embedding=x.astype(np.float32), age_years=ages if age is None else age, gender=gender)
    return path


def test_fit_guards_a_continuous_attribute_beside_a_categorical_one(tmp_path: Path) -> None:
    path = _write(tmp_path, 1200)
    sample = load_labelled_sample(path, attribute=["gender", "age_years"], continuous=["age_years"])
    registry = Registry(tmp_path / "registry")
    outcome = fit_version(sample, LIVE_AGES, registry=registry)
    entries = {entry["name"]: entry for entry in outcome.card["attributes"]}
    assert entries["age_years"]["kind"] == "continuous"
    ridge = entries["age_years"]["audit"]["leakage"]
    assert ridge["linear_before"]["r2"] > 0.4
    assert ridge["linear_after"]["r2_low"] < 0.02
    assert ridge["linear_after"]["mae"] == pytest.approx(ridge["linear_after"]["mae_baseline"], rel=0.05)
    stored = registry.read_version("ages", outcome.version_id).artifact
    assert [block.kind for block in stored.moments.blocks] == ["categorical", "continuous"]
    # Live checks take the continuous attribute's values (or predict pseudo-values without them).
    x, ages, _ = _ages(1200, seed=3)
    live = slice(0, 400)
    with TestClient(app_for(tmp_path / "registry")) as http, VeilClient(http_client=http) as client:
        labelled = client.drift("ages", x[live], {"age_years": (ages[live] + 20).tolist()})
        pseudo = client.drift("ages", x[live])
        refused = http.post(
            "/v1/erasers/ages/drift",
            json={"vectors": x[live].tolist(), "labels": {"age_years": ["old"] * 400}},
        )
    figures = labelled["attributes"]["age_years"]
    assert figures["labels"] == "labels"
    assert figures["value_mean"] == pytest.approx(np.mean(ages[live] + 20))
    # Twenty years in the fitted standard deviations (NumPy's, over every row: the fitting rows are 80% of them).
    assert figures["value_shift"] == pytest.approx(20 / np.std(ages), rel=0.05)
    assert figures["leakage"]["r2"] < 0.05
    assert pseudo["attributes"]["age_years"]["labels"] == "pseudo-values"
    assert pseudo["attributes"]["age_years"]["value_shift"] < 0.2
    assert refused.status_code == 422


@pytest.mark.parametrize(
    ("age", "message"),
    [
        (np.full(300, 41.0), "continuous attribute 'age_years' takes a single value"),
        (np.where(np.arange(300) == 7, np.nan, 30.0 + np.arange(300) % 50), "have no attribute label in 'age_years'"),
    ],
)
def test_bad_continuous_attributes_are_refused_by_name(tmp_path: Path, age: NDArray[np.float64], message: str) -> None:
    path = _write(tmp_path, 300, age=age)

    def fit() -> None:
        sample = load_labelled_sample(path, attribute=["gender", "age_years"], continuous=["age_years"])
        fit_version(sample, LIVE_AGES, registry=Registry(tmp_path / "registry"))

    with pytest.raises(DataError, match=message):
        fit()
    assert not (tmp_path / "registry" / "ages").exists()


def test_a_version_may_guard_a_continuous_attribute_alone(tmp_path: Path) -> None:
    path = _write(tmp_path, 1200)
    sample = load_labelled_sample(path, attribute="age_years", continuous=["age_years"])
    registry = Registry(tmp_path / "registry")
    outcome = fit_version(sample, LIVE_AGES, registry=registry)
    assert outcome.card["attribute"]["classes"] == []
    assert [entry["kind"] for entry in outcome.card["attributes"]] == ["continuous"]
    assert outcome.card["audit"]["leakage"]["linear_after"]["r2"] < 0.05
    x, ages, _ = _ages(1200, seed=3)
    held = holdout_mask(1200, fraction=0.2, seed=0)
    # E[x | age = 30] by the linear model of x on age, as scikit-learn's LinearRegression fits it on the fitting
    # rows: the counterfactual moves the fitting rows' cleaned mean onto it.
    expected = LinearRegression().fit(ages[~held, None], x[~held]).predict(np.array([[30.0]]))[0]
    with TestClient(app_for(tmp_path / "registry")) as http, VeilClient(http_client=http) as client:
        moved = client.counterfactual("ages", x[~held], {"age_years": 30})
        checked = client.drift("ages", x[:400])
        labelled = client.drift("ages", x[:400], {"age_years": ages[:400].tolist()})
        # A target too large for a float is refused, not a 500 (from the query it arrives as a Python int).
        huge = http.post(
            "/v1/erasers/ages/counterfactual",
            params={"target": json.dumps({"age_years": 10**400})},
            json={"vectors": x[:2].tolist()},
        )
        with pytest.raises(VeilClientError, match="give their values by attribute"):
            client.drift("ages", x[:400], ["30"] * 400)
    np.testing.assert_allclose(moved.vectors.mean(0), expected, atol=1e-4)
    assert checked["labels"] == "none"
    assert checked["prior_shift"] is None
    assert checked["attributes"]["age_years"]["labels"] == "pseudo-values"
    assert labelled["attributes"]["age_years"]["labels"] == "labels"  # the values given are used
    assert (huge.status_code, huge.json()["error"]["code"]) == (422, "invalid_request")
    # The evidence document of such a version still validates against its schema (the jsonschema library).
    schema = json.loads((Path(__file__).resolve().parents[1] / "docs" / "version-evidence.schema.json").read_text())
    document = json.loads(json.dumps(version_evidence(registry, "ages", "live")))
    jsonschema.Draft202012Validator(schema).validate(document)
    # Its report still draws the held-out rows on their principal axes, in one colour (there are no classes).
    page = registry.read_version("ages", "live").files[REPORT_FILE].decode()
    assert page.count("rows (no classes)") == 2
