"""Rows needed: the power-law fit, the projection on Gaussian data, the card's sentence, and older versions."""

from __future__ import annotations

import itertools
import json
import math
import shutil
from importlib import resources
from pathlib import Path

import jsonschema
import numpy as np
import pytest
from numpy.typing import NDArray
from scipy.optimize import curve_fit
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import StratifiedKFold, cross_val_predict
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from veil.audit import audit, rows_measure
from veil.audit.report import AuditReport
from veil.audit.rows_curve import EXPONENT_BOUNDS, NOT_RECORDED, LearningCurve, RowsNeeded, fit_power_law
from veil.audit.rows_measure import measure_rows_needed, nested_shares
from veil.erasers import LEACE
from veil.fitting.job import fit_version
from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, StoreSpec
from veil.registry import Registry
from veil.registry.card import format_card
from veil.reporting import version_report
from veil.samples.harbourline import SAMPLE_FILE
from veil.samples.sources import LabelledSample, load_labelled_sample
from veil.samples.splitting import give_every_class_both_parts, holdout_mask

from .test_cli import run
from .test_fresh_audit import _population, _save

LEGACY = Path(__file__).parent / "fixtures" / "registry_0_1" / "registry"
SCHEMA = json.loads((Path(__file__).resolve().parents[1] / "docs" / "version-evidence.schema.json").read_text())


def _reference_fit(rows: NDArray[np.float64], excess: NDArray[np.float64]) -> tuple[float, float]:
    """scipy.optimize.curve_fit's bounded least squares of ``excess ≈ a · rows^-b`` (the reference)."""
    (a, b), _ = curve_fit(
        lambda n, a, b: a * n ** (-b), rows, excess, p0=(1.0, 0.75),
        bounds=([0.0, EXPONENT_BOUNDS[0]], [np.inf, EXPONENT_BOUNDS[1]]),
        xtol=1e-14, ftol=1e-14, gtol=1e-14,
    )  # fmt: skip
    return float(a), float(b)


@pytest.mark.parametrize(("scale", "exponent", "noise"), [(3.0, 0.7, 0.0), (3.0, 0.7, 0.004), (0.8, 0.55, 0.002)])
def test_the_power_law_fit_agrees_with_scipy_curve_fit(scale: float, exponent: float, noise: float) -> None:
    rows = np.array([250.0, 500.0, 1000.0, 2000.0])
    excess = scale * rows ** (-exponent) + noise * np.random.default_rng(0).normal(size=rows.size)
    law = fit_power_law(rows, excess)
    a, b = _reference_fit(rows, excess)
    # Both minimise the same sum of squares; the bounded scalar search stops within 1e-6 of the exponent, which
    # moves the scale by about its logarithmic derivative, ln(rows) ≈ 8, times that.
    assert law.exponent == pytest.approx(b, abs=1e-5)
    assert law.scale == pytest.approx(a, rel=1e-4)
    if noise == 0.0:
        assert law.exponent == pytest.approx(exponent, abs=1e-5)
        assert law.scale == pytest.approx(scale, rel=1e-4)


def test_an_exponent_beyond_its_bounds_is_held_at_the_bound_as_scipy_holds_it() -> None:
    rows = np.array([100.0, 200.0, 400.0, 800.0])
    for true, bound in ((1.6, EXPONENT_BOUNDS[1]), (0.2, EXPONENT_BOUNDS[0])):
        excess = 2.0 * rows ** (-true)
        law = fit_power_law(rows, excess)
        assert law.exponent == bound == pytest.approx(_reference_fit(rows, excess)[1], abs=1e-9)


def test_a_curve_that_reads_nothing_projects_no_rows() -> None:
    curve = LearningCurve.fitted((100, 200, 400, 800), (-0.01, 0.0, -0.02, -0.005), baseline="majority",
                                 threshold=0.02)  # fmt: skip
    assert curve.scale == 0.0
    assert curve.expected == 0.0
    assert curve.projected_rows == 0
    assert curve.fastest_rows == 0
    assert curve.sentence(64) == (
        "with 800 rows for 64 dimensions expect about 0 above majority out of sample, under the linear threat's "
        "warn level of 0.02"
    )


def test_the_sentence_reads_as_the_issue_asks() -> None:
    # An exact 1/sqrt(rows) curve at 0.1 above majority on 1,500 rows: the threshold 0.02 is 5 times lower, so
    # 25 times the rows (37,500), or 5 times if it fell like 1/rows (7,500).
    rows = (187, 375, 750, 1500)
    excess = tuple(0.1 * math.sqrt(1500 / n) for n in rows)
    curve = LearningCurve.fitted(rows, excess, baseline="majority", threshold=0.02)
    assert curve.exponent == pytest.approx(0.5, abs=1e-9)
    assert curve.sentence(384) == (
        "with 1,500 rows for 384 dimensions expect about 0.10 above majority out of sample; about 38,000 rows bring "
        "it under 0.02 (about 7,500 if it falls like 1/rows from here)"
    )
    # The projection is where the curve reaches the threshold, to the row (here exactly at 37,500, so a few
    # float64 epsilons of round-off are allowed and cannot add a row).
    near = 0.02 * (1 + 8 * np.finfo(np.float64).eps)
    assert curve.projected_rows == 37500
    assert curve.law(curve.projected_rows) <= near < curve.law(curve.projected_rows - 1)


def test_the_shares_are_nested_and_stratified() -> None:
    codes = np.repeat([0, 1, 2], [700, 250, 50]).astype(np.intp)
    eighth, quarter, half = nested_shares(codes, (1 / 8, 1 / 4, 1 / 2), seed=3)
    assert (eighth.size, quarter.size, half.size) == (125, 250, 500)
    assert set(eighth) <= set(quarter) <= set(half)
    for drawn in (eighth, quarter, half):
        # Each class keeps its share to within a row (scikit-learn's stratified train_test_split draws them).
        expected = np.bincount(codes) * drawn.size / codes.size
        assert np.all(np.abs(np.bincount(codes[drawn], minlength=3) - expected) <= 1)


def _gaussian(n: int, rng: np.random.Generator, *, dim: int = 48) -> tuple[NDArray[np.float64], NDArray[np.str_]]:
    """Two classes 2 units apart along one fixed direction, in correlated Gaussian noise (structure from seed 0)."""
    structure = np.random.default_rng(0)
    mixing = structure.normal(size=(dim, dim)) / np.sqrt(dim)
    direction = structure.normal(size=dim)
    z = rng.integers(0, 2, n)
    x = rng.normal(size=(n, dim)) @ mixing + 2.0 * np.outer(z, direction / np.linalg.norm(direction))
    return x, np.array(["a", "b"])[z]


def _excess_by_scikit_learn(x: NDArray[np.float64], z: NDArray[np.str_]) -> float:
    """scikit-learn's standardised logistic regression, 5-fold on the held-out rows: accuracy above majority."""
    reader = make_pipeline(StandardScaler(), LogisticRegression(max_iter=3000))
    predicted = cross_val_predict(reader, x, z, cv=StratifiedKFold(5, shuffle=True, random_state=0))
    return float(np.mean(predicted == z) - max(np.mean(z == "a"), np.mean(z == "b")))


def test_the_projection_brackets_the_excess_measured_at_more_rows() -> None:
    """On Gaussian data, LEACE fitted on 600 rows projects the held-out excess at 4,800; scikit-learn measures it."""
    rng = np.random.default_rng(1)
    x_held, z_held = _gaussian(3000, rng)
    x_fit, z_fit = _gaussian(600, rng)
    codes = np.searchsorted(np.array(["a", "b"]), z_held).astype(np.intp)
    eraser = LEACE().fit(x_fit, z_fit)
    report = audit(eraser, x_held, z_held, nonlinear=False)
    needed = measure_rows_needed(
        eraser, x_fit, z_fit, report, x_held, codes, full_rows=600, threshold=0.02, folds=5, seed=0
    )
    curve = needed.population
    assert curve is not None
    assert curve.rows == (75, 150, 300, 600)
    # The refits' readings are the audit's reader; the full fit's point is the audit's own (the same reader
    # scikit-learn runs here, so the last point agrees with it to the row).
    assert curve.excess[-1] == pytest.approx(_excess_by_scikit_learn(eraser.transform(x_held), z_held), abs=1e-12)
    assert curve.expected > 0.02  # 600 rows in 48 dimensions leave a readable residue
    larger = 4800
    measured = _excess_by_scikit_learn(LEACE().fit(*_gaussian(larger, rng)).transform(x_held), z_held)
    # The sampling error of an accuracy on 3,000 rows near 1/2 is about 0.009: three of them either side.
    slack = 3 * math.sqrt(0.25 / 3000)
    fastest = curve.expected * 600 / larger  # the excess falling like 1/rows from the fit on
    assert fastest - slack <= measured <= curve.law(larger) + slack
    assert curve.projected_rows > 600
    assert curve.fastest_rows <= curve.projected_rows


def _fit(tmp_path: Path, *extra: str) -> tuple[Path, str]:
    data = _save(tmp_path / "fit.npz", *_population(1))
    registry = tmp_path / "registry"
    result = run(
        "fit", "--data", data, "--attribute", "region", "--task", "task", "--name", "planted", "--registry",
        registry, "--probes", "linear", *extra,
    )  # fmt: skip
    assert result.code == 0, result.err
    return registry, result.out.strip().splitlines()[-1]


def test_veil_fit_records_the_curve_and_every_view_says_it(tmp_path: Path) -> None:
    registry, version = _fit(tmp_path, "--method", "leace")
    stored = Registry(registry).read_version("planted", "1")
    report = AuditReport.from_dict(stored.card["audit"])
    needed = report.rows_needed
    assert needed is not None
    assert needed.population is not None
    assert needed.reason is None
    fit_rows = stored.card["data"]["fit_rows"]
    assert needed.population.rows[-1] == fit_rows
    # Each share drawn from the one before, each draw rounded to a whole row.
    shares = [n - share * fit_rows for n, share in zip(needed.population.rows, (1 / 8, 1 / 4, 1 / 2, 1), strict=True)]
    assert all(abs(off) <= 1 for off in shares)
    # The last point is the audit's own linear reader after erasure.
    linear = report.leakage.linear_after
    assert needed.population.excess[-1] == linear.accuracy - linear.majority  # type: ignore[union-attr]
    sentence = needed.population.sentence(report.dim)
    assert sentence.startswith(f"with {fit_rows:,} rows for {report.dim} dimensions expect about")
    shown = run("show", "planted", "1", "--registry", registry).out
    # The card's headline line, and the full audit's line with the points under it.
    assert [line.split(None, 2)[2] for line in shown.splitlines() if line.startswith("  rows needed ")] == [sentence]
    assert f"rows needed: {sentence}" in format_card(version, dict(stored.card)).splitlines()
    page = version_report(Registry(registry), "planted", "1")
    assert "<h2>Rows needed</h2>" in page
    assert "fitting rows</th>" in page
    assert "<svg" in page
    evidence = json.loads(run("show", "planted", "1", "--registry", registry, "--json").out)
    assert evidence["audit"]["rows_needed"]["population"]["projected_rows"] == needed.population.projected_rows
    # The evidence validates against docs/version-evidence.schema.json (the jsonschema library), and the schema
    # reads the record: a curve of the wrong baseline is refused.
    jsonschema.Draft202012Validator(SCHEMA).validate(evidence)
    evidence["audit"]["rows_needed"]["population"]["baseline"] = "median"
    with pytest.raises(jsonschema.ValidationError, match="is not valid under any of the given schemas"):
        jsonschema.Draft202012Validator(SCHEMA).validate(evidence)


def test_a_fit_within_a_context_also_measures_the_curve_within_it(tmp_path: Path) -> None:
    """LEACE guarding within ``field`` on the committed sample: the curve within the field, against the floor."""
    sample = load_labelled_sample(
        resources.files("veil.data") / SAMPLE_FILE, attribute="pronoun", task="field", given="field"
    )
    request = FitRequest(MethodSpec("leace", given="field"), StoreSpec("p"), audit=AuditSpec(nonlinear=False))
    outcome = fit_version(sample, request, registry=Registry(tmp_path))
    needed, context = outcome.audit.rows_needed, outcome.audit.context
    assert needed is not None
    assert needed.population is not None
    assert needed.context is not None
    assert context is not None
    assert needed.context_column == "field"
    assert needed.context.baseline == "floor"
    assert needed.context.rows == needed.population.rows
    # The last point is the audit's own within-field linear reader against its floor.
    assert needed.context.excess[-1] == context.after["linear"].accuracy - context.floor
    assert needed.sentences()[1].startswith(f"with {needed.context.rows[-1]:,} rows for 384 dimensions expect about")
    assert "above floor within 'field' out of sample" in needed.sentences()[1]


def test_a_method_whose_refits_are_slow_says_why_it_was_not_measured(tmp_path: Path) -> None:
    registry, _ = _fit(tmp_path, "--method", "inlp")
    card = Registry(registry).read_version("planted", "1").card
    needed = RowsNeeded.from_dict(card["audit"]["rows_needed"])
    assert needed.population is None
    assert "--rows-curve always" in str(needed.reason)
    assert card["request"]["audit"]["rows_curve"] == "auto"
    shown = run("show", "planted", "1", "--registry", registry).out
    headline = [line for line in shown.splitlines() if line.startswith("  rows needed ")]
    assert len(headline) == 1
    assert headline[0].split(None, 2)[2].startswith("not measured: inlp refits slowly")


def test_never_skips_the_refits(tmp_path: Path) -> None:
    registry, _ = _fit(tmp_path, "--method", "leace", "--rows-curve", "never")
    needed = RowsNeeded.from_dict(Registry(registry).read_version("planted", "1").card["audit"]["rows_needed"])
    assert needed.population is None
    assert needed.reason == "not asked for (--rows-curve never)"


def test_versions_stored_before_say_the_curve_was_not_measured(tmp_path: Path) -> None:
    registry = Path(shutil.copytree(LEGACY, tmp_path / "registry"))
    for number in ("1", "2"):
        card = Registry(registry).read_version("legacy", number).card
        assert "rows_needed" not in card["audit"]
        assert AuditReport.from_dict(card["audit"]).rows_needed is None
        shown = run("show", "legacy", number, "--registry", registry)
        assert shown.code == 0, shown.err
        assert NOT_RECORDED in shown.out
        page = version_report(Registry(registry), "legacy", number)
        assert "<h2>Rows needed</h2>" in page
        assert NOT_RECORDED.capitalize() in page


def test_the_refits_fit_on_fitting_rows_only_and_read_the_audited_held_out_rows(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    x, z, _ = _population(1, n=1200)
    held = give_every_class_both_parts(
        holdout_mask(x.shape[0], fraction=0.2, seed=0), np.unique(z, return_inverse=True)[1]
    )
    fitted: list[NDArray[np.float64]] = []
    read: list[NDArray[np.float64]] = []

    class Recorded(LEACE):
        def fit(self, X: NDArray[np.float64], z: object = None, **kwargs: object) -> Recorded:  # type: ignore[override]
            fitted.append(np.asarray(X))
            return super().fit(X, z, **kwargs)  # type: ignore[return-value]

        def transform(self, X: NDArray[np.float64]) -> NDArray[np.float64]:
            read.append(np.asarray(X))
            return super().transform(X)

    monkeypatch.setattr(rows_measure, "clone", lambda eraser: Recorded(**eraser.get_params()))
    sample = LabelledSample(embeddings=x, attribute=z, attribute_key="region", task=None, task_key=None, files={})
    outcome = fit_version(sample, FitRequest(MethodSpec("leace"), StoreSpec("held")), registry=Registry(tmp_path))
    assert [rows.shape[0] for rows in fitted] == list(outcome.audit.rows_needed.population.rows[:-1])  # type: ignore[union-attr]
    # Each refit's rows are fitting rows (found in x among the rows not held out, exactly), nested one in the next.
    where = {row.tobytes(): index for index, row in enumerate(x)}
    indices = [np.array([where[row.tobytes()] for row in rows]) for rows in fitted]
    for smaller, larger in itertools.pairwise(indices):
        assert not held[larger].any()
        assert set(smaller) <= set(larger)
    # Each refit reads exactly the held-out rows the audit read, in the same order.
    assert len(read) == 3
    for rows in read:
        np.testing.assert_array_equal(rows, x[held])
