"""Live-check levels calibrated on a version's own noise: p-values of quiet traffic, false alarms, planted changes.

A Gaussian population with a binary attribute (priors 0.6 / 0.4) planted along one direction; a LEACE version is
fitted on about 4,800 of its rows and calibrated on the 1,200 held out (20 draws per size for the probe figures).
Fresh samples of the same population are quiet traffic; the planted changes are made here.
"""

from __future__ import annotations

import io
import itertools
import shutil
from pathlib import Path

import numpy as np
import pytest
from numpy.typing import NDArray
from scipy import linalg, stats
from sklearn.metrics import calinski_harabasz_score

from reliability.planted import carry_along_hidden_direction, carrying_distance, hidden_direction
from veil.checks.calibration import (
    CALIBRATED,
    CALIBRATION_FILE,
    FIXED,
    FigureNull,
    LiveCalibration,
    holm_adjusted,
    null_key,
)
from veil.checks.drift import check_drift, class_mean_gap, erased_coordinates
from veil.checks.null_draws import GapPool, class_gap_draws, moment_figures, probe_sizes
from veil.checks.reference import ReferenceStatistics
from veil.fitting.job import fit_version
from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, StoreSpec
from veil.registry import Registry
from veil.samples.sources import load_labelled_sample
from veil.server.catalog import ServedVersion

from .test_cli import run

DIM = 12
PRIORS = (0.6, 0.4)
ROWS = 6_000
_SHAPE = np.random.default_rng(26)
MIXING = _SHAPE.normal(size=(DIM, DIM)) / np.sqrt(DIM)
DIRECTION = _SHAPE.normal(size=DIM)


def population(n: int, seed: int, priors: tuple[float, float] = PRIORS) -> tuple[NDArray[np.float64], list[str]]:
    """``n`` fresh rows of the population (or of one whose class shares are ``priors``) and their labels."""
    rng = np.random.default_rng(seed)
    z = (rng.random(n) < priors[1]).astype(np.intp)
    x = rng.normal(size=(n, DIM)) @ MIXING + np.outer(z, DIRECTION)
    return x, ["b" if code else "a" for code in z]


def served_version(tmp: Path, draws: int) -> ServedVersion:
    x, labels = population(ROWS, seed=0)
    np.savez(tmp / "sample.npz", embedding=x, group=np.array(labels))
    registry = Registry(tmp / "registry")
    request = FitRequest(MethodSpec("leace"), StoreSpec("groups"), audit=AuditSpec(nonlinear=False, live_draws=draws))
    outcome = fit_version(load_labelled_sample(tmp / "sample.npz", attribute="group"), request, registry=registry)
    return ServedVersion.from_stored(registry.read_version("groups", outcome.version_id), threshold_overrides=None)


@pytest.fixture(scope="module")
def served(tmp_path_factory: pytest.TempPathFactory) -> ServedVersion:
    return served_version(tmp_path_factory.mktemp("calibrated"), draws=20)


def check(served: ServedVersion, x: NDArray[np.float64], labels: list[str] | None = None) -> dict[str, object]:
    return check_drift(
        served.artifact, served.reference, served.whitening, served.thresholds, x,
        classes=served.classes, labels=labels, calibration=served.calibration,
    ).to_dict()  # fmt: skip


def test_a_fit_stores_its_calibration_and_the_card_names_the_rule(served: ServedVersion) -> None:
    calibration = served.calibration
    assert calibration is not None
    levels = served.card["live_levels"]
    assert (levels["rule"], levels["warn"], levels["alert"], levels["correction"]) == (CALIBRATED, 0.01, 0.001, "holm")
    held = served.card["data"]["heldout_rows"]
    assert levels["held_out_rows"] == held
    for source in ("labels", "pseudo-labels"):
        # The probe figures are drawn without replacement at the grid's sizes up to half the held-out rows.
        assert calibration.nulls[null_key("leakage_gap", source)].sizes.tolist() == [100, 300, held // 2]
        assert calibration.nulls[null_key("prior_shift", source)].sizes.tolist() == [100, 300, 1000, 3000]
    again = LiveCalibration.from_bytes(calibration.to_bytes())
    assert sorted(again.nulls) == sorted(calibration.nulls)
    for key, null in calibration.nulls.items():
        for part in ("sizes", "draws", "mean", "sd", "skew", "quantiles"):
            np.testing.assert_array_equal(getattr(again.nulls[key], part), getattr(null, part))


def test_a_calibration_of_a_newer_format_is_refused(served: ServedVersion) -> None:
    assert served.calibration is not None
    data = served.calibration.to_bytes()
    with np.load(io.BytesIO(data)) as stored:
        arrays = {name: stored[name] for name in stored.files}
    arrays["format"] = np.array(99)
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    with pytest.raises(ValueError, match="format 99"):
        LiveCalibration.from_bytes(buffer.getvalue())


def test_the_drawn_shift_figures_are_the_live_checks(served: ServedVersion) -> None:
    x, _ = population(250, seed=1)
    report = check(served, x)
    white = (x - served.reference.mean) @ served.whitening
    removed = served.artifact.map.component(x)
    share = served.reference.erased_variance_share
    drawn = moment_figures(x, white, removed, share, np.ones((1, x.shape[0])))
    # The same figures by another sum: float64 round-off over a few thousand terms is far below 1e-9 of them.
    expected = [report["mean_shift_raw"], report["covariance_shift_raw"], report["erased_variance_ratio"]]
    np.testing.assert_allclose([float(values[0]) for values in drawn], expected, rtol=1e-9)


def test_quiet_traffic_gives_uniform_p_values(served: ServedVersion) -> None:
    calibration = served.calibration
    assert calibration is not None
    p_values: dict[str, list[float]] = {"mean_shift": [], "covariance_shift": [], "erased_variance_ratio": []}
    for seed in range(400):
        x, _ = population(300, seed=1000 + seed)
        white = (x - served.reference.mean) @ served.whitening
        drawn = moment_figures(
            x, white, served.artifact.map.component(x), served.reference.erased_variance_share, np.ones((1, 300))
        )
        for figure, values in zip(p_values, drawn, strict=True):
            p_values[figure].append(calibration.nulls[null_key(figure)].p_value(float(values[0]), 300))
    for figure, values in p_values.items():
        # Kolmogorov-Smirnov against the uniform (scipy.stats.kstest); a loose level, so that 400 checks of a
        # correct calibration fail about once in a thousand runs, while a curve off by a fifth of its spread fails.
        assert stats.kstest(values, "uniform").pvalue > 1e-3, figure


def test_false_alarms_at_the_warn_level_stay_within_a_binomial_interval(served: ServedVersion) -> None:
    checks, warned, alerted = 160, 0, 0
    for seed in range(checks):
        x, labels = population(150, seed=5000 + seed)
        # Half the checks post the labels, half leave the probe's pseudo-labels to stand in.
        report = check(served, x, labels if seed % 2 else None)
        assert report["rule"] == CALIBRATED
        warned += report["status"] != "ok"
        alerted += report["status"] == "alert"
    # At most 1% warnings and 0.1% alerts family-wise: more, one-sided, at a loose level (scipy.stats.binomtest).
    assert stats.binomtest(warned, checks, 0.01, alternative="greater").pvalue > 1e-3
    assert stats.binomtest(alerted, checks, 0.001, alternative="greater").pvalue > 1e-3


def test_planted_shifts_alert_at_300_rows(served: ServedVersion) -> None:
    reference = served.reference
    # A mean shift of one standard deviation along the leading axis.
    axis = reference.eigenvectors[:, 0] * np.sqrt(reference.eigenvalues[0])
    for seed in range(5):
        x, _ = population(300, seed=9000 + seed)
        report = check(served, x + axis)
        assert report["status"] == "alert"
        assert any(reason.startswith("mean_shift") for reason in report["reasons"])  # type: ignore[attr-defined]
    # A prior shift of 0.2 in total variation (0.6 / 0.4 to 0.8 / 0.2), with labels.
    for seed in range(5):
        x, labels = population(300, seed=9100 + seed, priors=(0.8, 0.2))
        report = check(served, x, labels)
        assert report["status"] == "alert"
        p_values = report["p_values"]
        assert isinstance(p_values, dict)
        assert p_values["prior_shift"] < 1e-4


def test_a_version_without_calibration_keeps_the_fixed_levels_and_says_so(tmp_path: Path) -> None:
    old = served_version(tmp_path, draws=0)
    assert old.calibration is None
    assert CALIBRATION_FILE not in old.card.get("live_levels", {}).values()
    assert old.card["live_levels"] == {"rule": FIXED}
    x, _ = population(300, seed=3)
    report = check(old, x + 3 * old.reference.eigenvectors[:, 0] * np.sqrt(old.reference.eigenvalues[0]))
    assert (report["rule"], report["p_values"], report["levels"]) == (FIXED, None, None)
    # No fixed band reads the class-mean gap: reported, judged by neither rule, and the answer says so.
    assert report["not_judged"] == ["class_mean_gap"]
    # The fixed band's reason, as before calibration: the figure and the level it reaches.
    assert report["status"] == "alert"
    assert any(reason.startswith("mean_shift") and "reaches alert (1.0)" in reason for reason in report["reasons"])  # type: ignore[attr-defined]


def test_holm_is_the_closed_testing_of_bonferroni() -> None:
    # Holm's adjusted p-value of hypothesis i is the largest Bonferroni p-value of any intersection holding i
    # (the closed testing principle with Bonferroni local tests, a published theorem).
    rng = np.random.default_rng(4)
    for _ in range(20):
        p = list(rng.random(5) ** 3)
        expected = [
            max(
                min(1.0, len(subset) * min(p[j] for j in subset))
                for size in range(1, 6)
                for subset in itertools.combinations(range(5), size)
                if i in subset
            )
            for i in range(5)
        ]
        np.testing.assert_allclose(holm_adjusted(p), expected, rtol=1e-12)


def test_the_tail_follows_a_gamma_figure_and_a_power_law_between_sizes() -> None:
    rng = np.random.default_rng(7)
    shape = 3.0
    draws = {100: rng.gamma(shape, 1 / np.sqrt(100), 20_000), 400: rng.gamma(shape, 1 / np.sqrt(400), 20_000)}
    null = FigureNull.from_draws(draws)
    for n in (100, 200, 400):
        scale = 1 / np.sqrt(n)
        for tail in (1e-2, 1e-4):
            # scipy.stats.gamma: a gamma figure's Pearson type III curve is that gamma (the sampling error of
            # 20,000 draws' moments moves a 1e-4 tail by well under a factor of two).
            value = stats.gamma.isf(tail, shape, scale=scale)
            assert 0.5 < null.p_value(float(value), n) / tail < 2.0, (n, tail)
    # A left-skewed estimate is read as no skew: the normal tail (scipy.stats.norm), never a curve with an end.
    left = FigureNull.from_draws({300: -rng.gamma(2.0, 1.0, 5000)})
    mean, sd, skew = left.curve(300)
    assert skew == 0.0
    assert left.p_value(mean + 4 * sd, 300) == pytest.approx(stats.norm.sf(4), rel=1e-9)


def test_a_version_fitted_within_a_context_calibrates_the_leakage_within_it(tmp_path: Path) -> None:
    x, labels = population(3000, seed=40)
    field = np.where(np.random.default_rng(41).random(3000) < 0.5, "north", "south")
    np.savez(tmp_path / "sample.npz", embedding=x, group=np.array(labels), field=field)
    request = FitRequest(
        MethodSpec("leace", given="field"), StoreSpec("fields"), audit=AuditSpec(nonlinear=False, live_draws=5)
    )
    registry = Registry(tmp_path / "registry")
    outcome = fit_version(load_labelled_sample(tmp_path / "sample.npz", attribute="group", given="field"), request,
                          registry=registry)  # fmt: skip
    served = ServedVersion.from_stored(registry.read_version("fields", outcome.version_id), threshold_overrides=None)
    assert served.calibration is not None
    null = served.calibration.nulls[null_key("context_leakage_gap", "labels")]
    # Drawn like the leakage, without replacement at the grid's sizes up to half the held-out rows (and that half).
    assert null.sizes.tolist() == probe_sizes(served.card["data"]["heldout_rows"])
    quiet, quiet_labels = population(300, seed=42)
    report = check_drift(
        served.artifact, served.reference, served.whitening, served.thresholds, quiet, classes=served.classes,
        labels=quiet_labels, context=list(np.where(np.arange(300) % 2, "north", "south")),
        calibration=served.calibration,
    ).to_dict()  # fmt: skip
    # The leakage within the posted context is judged by its own draws: a p-value, no fixed band.
    assert report["rule"] == CALIBRATED
    assert "context_leakage_gap" in report["p_values"]
    assert not any("fixed level" in reason for reason in report["reasons"])


def test_a_version_of_an_older_release_is_checked_by_the_fixed_levels_and_says_so(tmp_path: Path) -> None:
    # tests/fixtures/registry_0_1: versions written before live checks were calibrated (no calibration.npz, no
    # live_levels on the card).
    fixture = Path(__file__).parent / "fixtures" / "registry_0_1"
    registry = Registry(Path(shutil.copytree(fixture / "registry", tmp_path / "registry")))
    stored = registry.read_version("legacy", "v0001")
    assert CALIBRATION_FILE not in stored.files
    assert "live_levels" not in stored.card
    old = ServedVersion.from_stored(stored, threshold_overrides=None)
    assert old.calibration is None
    x = np.load(fixture / "sample.npz")["embedding"]
    report = check_drift(
        old.artifact, old.reference, old.whitening, old.thresholds, x[:200], classes=old.classes,
        calibration=old.calibration,
    )  # fmt: skip
    assert (report.rule, report.levels, report.p_values) == (FIXED, None, None)
    shown = run("show", "legacy", "v0001", "--registry", str(tmp_path / "registry"))
    assert "live checks: fixed levels (no calibration stored with this version)" in shown.out


def quiet_gaps(served: ServedVersion, x: NDArray[np.float64], labels: list[str]) -> dict[str, float]:
    """The class-mean gap of a sample with its labels and with the pre-erasure probe's pseudo-labels."""
    coordinates = erased_coordinates(served.artifact.apply(x), served.reference)
    codes = np.array([served.classes.index(label) for label in labels], dtype=np.intp)
    return {
        "labels": class_mean_gap(coordinates, codes),
        "pseudo-labels": class_mean_gap(coordinates, served.reference.probe_codes(x)),
    }


def test_the_class_mean_gap_is_the_between_class_spread() -> None:
    # scikit-learn's Calinski-Harabasz index is [tr(B) / (K − 1)] / [tr(W) / (n − K)] with tr(B) = Σ_c n_c ‖m_c − m‖²
    # and tr(W) the within-class sum of squares: the gap is sqrt(tr(B) / n).
    rng = np.random.default_rng(11)
    rows = rng.normal(size=(90, 7))
    codes = rng.integers(0, 3, 90).astype(np.intp)
    within = sum(float(np.sum((rows[codes == c] - rows[codes == c].mean(axis=0)) ** 2)) for c in range(3))
    between = calinski_harabasz_score(rows, codes) * (3 - 1) / (90 - 3) * within
    assert class_mean_gap(rows, codes) == pytest.approx(np.sqrt(between / 90), rel=1e-12)
    # One class: no class mean lies apart from the overall mean.
    assert class_mean_gap(rows, np.zeros(90, dtype=np.intp)) == 0.0


def test_erased_coordinates_read_the_leading_directions_whitened_and_the_rest_at_its_mean_variance() -> None:
    # 140 dimensions, of which the reference keeps 128 eigenvectors (and every eigenvalue).
    d = 140
    rng = np.random.default_rng(12)
    vectors, _ = np.linalg.qr(rng.normal(size=(d, d)))
    values = np.sort(rng.uniform(0.5, 20.0, d))[::-1]
    reference = ReferenceStatistics(
        mean=rng.normal(size=d), eigenvalues=values, eigenvectors=vectors[:, :128], erased_variance_share=0.0,
        class_priors=np.array([0.5, 0.5]), class_means=np.zeros((2, d)), probe_weights=np.zeros((1, d)),
        probe_bias=np.zeros(1),
    )  # fmt: skip
    rows = rng.normal(size=(5, d)) * 3
    coordinates = erased_coordinates(rows, reference)
    assert coordinates.shape == (5, 128 + d)
    # Squared norms are the Mahalanobis form of C = V₁ Λ₁ V₁ᵀ + σ² (I − V₁ V₁ᵀ), σ² the mean of the other
    # eigenvalues, solved densely by scipy.linalg.solve.
    lead = vectors[:, :128]
    covariance = (lead * values[:128]) @ lead.T + values[128:].mean() * (np.eye(d) - lead @ lead.T)
    centred = rows - reference.mean
    expected = np.einsum("ij,ji->i", centred, linalg.solve(covariance, centred.T, assume_a="pos"))
    np.testing.assert_allclose(np.sum(coordinates**2, axis=1), expected, rtol=1e-9)


def test_the_drawn_class_mean_gap_is_the_live_checks(served: ServedVersion) -> None:
    calibration = served.calibration
    assert calibration is not None
    for source in ("labels", "pseudo-labels"):
        assert calibration.nulls[null_key("class_mean_gap", source)].sizes.tolist() == [100, 300, 1000, 3000]
    x, labels = population(250, seed=2)
    coordinates = erased_coordinates(served.artifact.apply(x), served.reference)
    for given, codes in ((labels, np.array([served.classes.index(c) for c in labels])), (None, None)):
        report = check(served, x, given)
        if codes is None:
            codes = served.reference.probe_codes(x)
        # The draws' sum, weighted by how often each row is drawn, on the check's rows once each: float64
        # round-off over a few hundred terms is far below 1e-9 of the figure.
        drawn = class_gap_draws(GapPool(coordinates, codes.astype(np.intp)), np.ones((1, 250)))
        assert float(drawn[0]) == pytest.approx(report["class_mean_gap"], rel=1e-9)
        assert "class_mean_gap" in report["p_values"]  # type: ignore[operator]
    # A bootstrap draw (rows twice, rows left out) is the figure of the rows it repeats.
    counts = np.random.default_rng(3).multinomial(250, np.full(250, 1 / 250))
    repeated = np.repeat(np.arange(250), counts)
    pool = GapPool(coordinates, np.asarray(codes, dtype=np.intp))
    np.testing.assert_allclose(
        class_gap_draws(pool, counts[None, :].astype(np.float64)),
        [class_mean_gap(coordinates[repeated], pool.codes[repeated])],
        rtol=1e-9,
    )


def test_quiet_traffic_gives_uniform_class_mean_gap_p_values(served: ServedVersion) -> None:
    calibration = served.calibration
    assert calibration is not None
    p_values: dict[str, list[float]] = {"labels": [], "pseudo-labels": []}
    for seed in range(400):
        x, labels = population(300, seed=2000 + seed)
        for source, gap in quiet_gaps(served, x, labels).items():
            p_values[source].append(calibration.nulls[null_key("class_mean_gap", source)].p_value(gap, 300))
    for source, values in p_values.items():
        # Kolmogorov-Smirnov against the uniform (scipy.stats.kstest), at the loose level of the shift figures.
        assert stats.kstest(values, "uniform").pvalue > 1e-3, source


def test_a_sub_population_carrying_the_attribute_along_a_hidden_direction_alerts_at_300_rows(
    served: ServedVersion,
) -> None:
    fit_x, fit_labels = population(ROWS, seed=0)
    direction = hidden_direction(served.artifact, seed=5)
    # Each moved row as far from the other side as the raw class means are apart.
    strength = carrying_distance(fit_x, np.array(fit_labels))
    for seed in range(4):
        x, labels = population(300, seed=9200 + seed)
        moved, _ = carry_along_hidden_direction(
            x, np.array(labels), direction, share=0.2, strength=strength, rng=np.random.default_rng(seed)
        )
        for given in (labels, None):
            report = check(served, moved.astype(np.float64), given)
            assert report["status"] == "alert"
            p_values = report["p_values"]
            assert isinstance(p_values, dict)
            assert p_values["class_mean_gap"] < 1e-4
            # What reads it is the class-mean gap: the probe's leakage on 300 rows does not reach a level.
            assert any(reason.startswith("class_mean_gap") for reason in report["reasons"])  # type: ignore[attr-defined]


def test_a_calibration_stored_before_the_class_mean_gap_leaves_it_unjudged_and_says_so(
    served: ServedVersion,
) -> None:
    calibration = served.calibration
    assert calibration is not None
    older = LiveCalibration(
        {key: null for key, null in calibration.nulls.items() if not key.startswith("class_mean_gap")},
        calibration.held_out_rows,
    )
    again = LiveCalibration.from_bytes(older.to_bytes())
    x, labels = population(300, seed=4)
    report = check_drift(
        served.artifact, served.reference, served.whitening, served.thresholds, x, classes=served.classes,
        labels=labels, calibration=again,
    ).to_dict()  # fmt: skip
    assert report["rule"] == CALIBRATED
    assert report["class_mean_gap"] is not None
    assert "class_mean_gap" not in report["p_values"]
    assert report["not_judged"] == ["class_mean_gap"]
    # The figures it does hold are judged as before.
    assert set(report["p_values"]) == {
        "mean_shift", "covariance_shift", "erased_variance_ratio", "prior_shift", "leakage_gap",
    }  # fmt: skip


def test_quiet_samples_larger_than_any_drawn_do_not_alarm() -> None:
    # A mean-shift figure carries the reference's own error e (fixed) plus the sample's: ‖e + x̄_n‖ with x̄_n drawn
    # as N(0, I/n) (the sampling law of a mean of n standard Gaussian rows; a textbook fact, not a measurement).
    # Its curve levels off at ‖e‖; a curve extended along its fall from 1,000 and 3,000 rows would sink below it.
    rng = np.random.default_rng(11)
    d, fit_rows = 128, 1920
    error = rng.standard_normal(d) / np.sqrt(fit_rows)

    def figure(n: int, count: int) -> NDArray[np.float64]:
        return np.linalg.norm(error + rng.standard_normal((count, d)) / np.sqrt(n), axis=1)

    null = FigureNull.from_draws({n: figure(n, 300) for n in (100, 300, 1000, 3000)})
    for n in (6000, 20000):
        p = np.array([null.p_value(float(value), n) for value in figure(n, 200)])
        assert np.isfinite(p).all()
        # An alert needs about 1e-4 per figure after Holm over ten; quiet samples must not reach it
        # (one-sided binomial bound at 1%, scipy.stats.binomtest).
        alarms = int(np.count_nonzero(p <= 1e-4))
        assert stats.binomtest(alarms, p.size, 1e-4, alternative="greater").pvalue > 0.01, (n, alarms)


def test_a_size_whose_draws_did_not_spread_gives_finite_p_values() -> None:
    null = FigureNull.from_draws({100: np.zeros(20), 300: np.linspace(-0.1, 0.1, 20)})
    for n in (20, 100, 200, 300, 1000, 100000):
        for value in (0.0, 0.05, 1.0):
            p = null.p_value(value, n)
            assert 0.0 <= p <= 1.0, (n, value, p)


@pytest.mark.parametrize(
    "damage", ["empty", "truncated", "lengths", "not finite"], ids=lambda damage: damage.replace(" ", "-")
)
def test_a_damaged_calibration_is_refused_by_name(served: ServedVersion, damage: str) -> None:
    assert served.calibration is not None
    data = served.calibration.to_bytes()
    with np.load(io.BytesIO(data)) as stored:
        arrays = {name: stored[name] for name in stored.files}
    if damage == "lengths":
        arrays["0.mean"] = arrays["0.mean"][:-1]
    if damage == "not finite":
        arrays["0.sd"] = np.full_like(arrays["0.sd"], np.nan)
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    written = {"empty": b"", "truncated": data[: len(data) // 2]}.get(damage, buffer.getvalue())
    with pytest.raises(ValueError, match=r"calibration|curve"):
        LiveCalibration.from_bytes(written)
