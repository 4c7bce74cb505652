"""The independence tests: calibrated when there is no dependence, powered as they report, checked against scipy.

Small rows, few dimensions and few permutations keep the whole file to seconds.
"""

from __future__ import annotations

import html
from collections.abc import Callable
from dataclasses import replace

import numpy as np
import pytest
from numpy.typing import NDArray
from scipy import stats
from sklearn.discriminant_analysis import LinearDiscriminantAnalysis
from sklearn.metrics.pairwise import rbf_kernel
from sklearn.model_selection import StratifiedKFold, cross_val_predict

from veil.audit.geometry import nearest_neighbours
from veil.audit.independence import (
    class_sums,
    holm,
    kernel_test,
    neighbour_test,
    reader_test,
    squared_distances,
)
from veil.audit.independence_report import NOT_RUN, TEST_LABELS, TEST_MEANINGS, IndependenceAudit
from veil.audit.power import PowerSettings, planted, reader_run, smallest_strengths
from veil.audit.report import AuditReport
from veil.checks.thresholds import AuditThresholds
from veil.checks.verdict import THREATS, judge_audit
from veil.reporting.independence import independence_section

DRAWS = 200
ROWS = 60
DIM = 3
PERMUTATIONS = 99
ALPHA = 0.05


def _predictions(
    x: NDArray[np.floating], codes: NDArray[np.intp], groups: NDArray[np.intp] | None = None
) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
    """Held-out predictions of a cheap linear reader (scikit-learn's LDA, 5 stratified folds), and the first fold."""
    assert groups is None
    folds = StratifiedKFold(n_splits=5, shuffle=True, random_state=0)
    predicted = np.asarray(cross_val_predict(LinearDiscriminantAnalysis(), x, codes, cv=folds), dtype=np.intp)
    return predicted, next(iter(folds.split(x, codes)))[1]


def _null_p_values(name: str, classes: int) -> NDArray[np.float64]:
    """The test's p-values on DRAWS samples whose labels carry nothing (drawn independently of the rows)."""
    rng = np.random.default_rng(7)
    out = []
    for _ in range(DRAWS):
        x = rng.standard_normal((ROWS, DIM))
        # One class split at random into `classes` labels: balanced and independent of the rows.
        codes = rng.permutation(np.arange(ROWS) % classes).astype(np.intp)
        if name == "kernel":
            outcome = kernel_test(x, codes, permutations=PERMUTATIONS, rng=rng, bootstrap=0)
        elif name == "neighbours":
            outcome = neighbour_test(nearest_neighbours(x, 10), codes, permutations=PERMUTATIONS, rng=rng, bootstrap=0)
        else:
            predicted, rows = _predictions(x, codes)
            outcome = reader_test(predicted, codes, {}, "linear", rows=rows, permutations=PERMUTATIONS, rng=rng)
        out.append(outcome.p_value)
    return np.asarray(out)


@pytest.mark.parametrize(("name", "classes"), [("kernel", 2), ("kernel", 3), ("readers", 2), ("neighbours", 2)])
def test_p_values_are_uniform_without_dependence(name: str, classes: int) -> None:
    p = _null_p_values(name, classes)
    # Uniform p-values: scipy.stats.kstest against the uniform distribution does not reject at 1%.
    assert stats.kstest(p, "uniform").pvalue > 0.01
    # The false-positive rate at 0.05 lies within its binomial interval: scipy.stats.binomtest does not reject.
    rejections = int(np.count_nonzero(p < ALPHA))
    assert stats.binomtest(rejections, DRAWS, ALPHA).pvalue > 0.01


def _context_null(rng: np.random.Generator) -> tuple[NDArray[np.float64], NDArray[np.intp], NDArray[np.intp]]:
    """Rows that depend on a context of two values whose class shares differ (0.8 / 0.2), and on nothing else:
    the class tells about the rows through the context only."""
    groups = (np.arange(ROWS) % 2).astype(np.intp)
    codes = (rng.random(ROWS) < np.where(groups == 0, 0.8, 0.2)).astype(np.intp)
    x = rng.standard_normal((ROWS, DIM))
    x[:, 0] += 3.0 * groups
    return x, codes, groups


@pytest.mark.parametrize("name", ["kernel", "neighbours"])
def test_p_values_within_a_context_are_uniform_when_only_the_context_tells(name: str) -> None:
    rng = np.random.default_rng(13)
    p, pooled = [], []
    for _ in range(DRAWS):
        x, codes, groups = _context_null(rng)
        if name == "kernel":
            p.append(kernel_test(x, codes, permutations=PERMUTATIONS, rng=rng, bootstrap=0, groups=groups).p_value)
            pooled.append(kernel_test(x, codes, permutations=PERMUTATIONS, rng=rng, bootstrap=0).p_value)
        else:
            queries = np.concatenate([np.flatnonzero(groups == g) for g in (0, 1)])
            found = np.concatenate(
                [np.flatnonzero(groups == g)[nearest_neighbours(x[groups == g], 10)] for g in (0, 1)]
            )
            p.append(
                neighbour_test(
                    found, codes, permutations=PERMUTATIONS, rng=rng, bootstrap=0, queries=queries, groups=groups
                ).p_value
            )
            pooled.append(
                neighbour_test(
                    nearest_neighbours(x, 10), codes, permutations=PERMUTATIONS, rng=rng, bootstrap=0
                ).p_value
            )
    values = np.asarray(p)
    # Uniform within the context (scipy.stats.kstest) with false positives in their binomial interval
    # (scipy.stats.binomtest) ...
    assert stats.kstest(values, "uniform").pvalue > 0.01
    assert stats.binomtest(int(np.count_nonzero(values < ALPHA)), DRAWS, ALPHA).pvalue > 0.01
    # ... while the pooled test, which counts what the context tells, rejects far more often than 5%.
    assert np.mean(np.asarray(pooled) < ALPHA) > 0.5


def _shifted(
    rows: int, shift: float, rng: np.random.Generator
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.intp]]:
    """Raw rows whose class moves the first coordinate by ``shift``, their erased form (that coordinate's class
    mean removed: a map that leaves nothing), and the classes."""
    codes = (np.arange(rows) % 2).astype(np.intp)
    x = rng.standard_normal((rows, DIM))
    x[:, 0] += shift * (codes - 0.5)
    erased = x.copy()
    erased[:, 0] -= shift * (codes - 0.5)
    return x, erased, codes


def test_planted_dependence_is_detected_at_the_power_reported() -> None:
    rng = np.random.default_rng(3)
    raw, erased, codes = _shifted(480, 3.0, rng)
    settings = PowerSettings(grid=(0.2, 0.4, 0.6, 0.8, 1.0), draws=20, permutations=PERMUTATIONS, readers=True)
    result = smallest_strengths(
        raw, erased, codes, neighbours=lambda x, apart: nearest_neighbours(x, 10, apart),
        reader=reader_run(_predictions, "linear"), settings=settings, rng=rng,
    )  # fmt: skip
    assert result.rows == 120
    for name, strength in result.smallest.items():
        assert strength is not None, name
        assert strength < 1.0, name
        # Fresh samples of a draw's size, planted at the strength reported, are detected in 80% of draws at least
        # (scipy.stats.binomtest, one-sided, does not find the rate below 0.8).
        detected = 0
        for _ in range(60):
            fresh_raw, fresh_erased, fresh_codes = _shifted(result.rows, 3.0, rng)
            x = planted(fresh_raw, fresh_erased, strength)
            if name == "kernel":
                p = kernel_test(x, fresh_codes, permutations=PERMUTATIONS, rng=rng, bootstrap=0).p_value
            elif name == "neighbours":
                p = neighbour_test(
                    nearest_neighbours(x, 10), fresh_codes, permutations=PERMUTATIONS, rng=rng, bootstrap=0
                ).p_value
            else:
                predicted, rows = _predictions(x, fresh_codes)
                p = reader_test(
                    predicted, fresh_codes, {}, "linear", rows=rows, permutations=PERMUTATIONS, rng=rng
                ).p_value
            detected += p < ALPHA
        assert stats.binomtest(detected, 60, 0.8, alternative="less").pvalue > 0.01, (name, strength, detected)


def test_erased_rows_are_not_flagged_and_raw_rows_are() -> None:
    rng = np.random.default_rng(5)
    raw, erased, codes = _shifted(200, 2.0, rng)
    assert kernel_test(raw, codes, permutations=PERMUTATIONS, rng=rng).p_value < ALPHA
    assert neighbour_test(nearest_neighbours(raw, 10), codes, permutations=PERMUTATIONS, rng=rng).p_value < ALPHA
    # The erased rows read as no dependence: the effect's upper bound reaches no farther than the raw rows' estimate.
    kept = kernel_test(erased, codes, permutations=PERMUTATIONS, rng=rng)
    before = kernel_test(raw, codes, permutations=PERMUTATIONS, rng=rng)
    assert kept.effect_upper < before.effect


def test_kernel_statistic_is_the_two_sample_discrepancy() -> None:
    """For two classes, ``sum_c 1_c'K1_c/n_c - 1'K1/n`` is ``n1 n2 / n`` times the (biased) squared MMD."""
    rng = np.random.default_rng(0)
    x = rng.standard_normal((30, 4))
    codes = np.array([0] * 12 + [1] * 18, dtype=np.intp)
    gamma = 0.3
    # scikit-learn's rbf_kernel is exp(-gamma |x - y|²): the reference kernel matrix.
    kernel = rbf_kernel(x, gamma=gamma)
    ours = np.exp(-gamma * squared_distances(x))
    np.testing.assert_allclose(ours, kernel, rtol=0, atol=1e3 * np.finfo(np.float64).eps)
    a, b = codes == 0, codes == 1
    mmd2 = kernel[a][:, a].mean() + kernel[b][:, b].mean() - 2 * kernel[a][:, b].mean()
    between = class_sums(ours, codes[None, :], np.bincount(codes))[0] - ours.sum() / codes.size
    assert between == pytest.approx(12 * 18 / 30 * mmd2, rel=1e-12)


def test_neighbour_p_value_agrees_with_scipy_permutation_test() -> None:
    rng = np.random.default_rng(11)
    raw, _, codes = _shifted(80, 0.8, rng)
    neighbours = nearest_neighbours(raw, 10)
    ours = neighbour_test(neighbours, codes, permutations=4000, rng=rng, bootstrap=0).p_value

    def same(labels: NDArray[np.intp]) -> float:
        return float(np.count_nonzero(labels[neighbours] == labels[:, None]))

    _assert_between_scipy_tails(ours, same, codes)


def _assert_between_scipy_tails(
    ours: float, statistic: Callable[[NDArray[np.intp]], float], codes: NDArray[np.intp]
) -> None:
    """``ours`` lies between the upper tails of scipy.stats.permutation_test's null distribution with ties counted
    (its own p-value) and without them: ours splits ties at random."""
    result = stats.permutation_test(
        (codes,), statistic, permutation_type="pairings", alternative="greater", n_resamples=4000, random_state=1
    )
    null = np.asarray(result.null_distribution)
    with_ties = (np.count_nonzero(null >= result.statistic) + 1) / (null.size + 1)
    without = np.count_nonzero(null > result.statistic) / (null.size + 1)
    # Monte Carlo error of 4000 permutations on each side: 4 standard errors of the larger p-value.
    slack = 4 * np.sqrt(with_ties * (1 - with_ties) / 4000)
    assert without - slack <= ours <= with_ties + slack


def test_reader_p_value_agrees_with_scipy_permutation_test() -> None:
    rng = np.random.default_rng(2)
    raw, _, codes = _shifted(100, 0.7, rng)
    predicted, rows = _predictions(raw, codes)
    ours = reader_test(predicted, codes, {}, "linear", rows=rows, permutations=4000, rng=rng).p_value

    fold_codes, fold_predicted = codes[rows], predicted[rows]
    _assert_between_scipy_tails(ours, lambda labels: float(np.count_nonzero(labels == fold_predicted)), fold_codes)


def test_holm_rejects_as_the_step_down_rule() -> None:
    """Holm's rule by its definition: sort ascending, reject while p_(j) <= alpha / (m - j + 1), stop at the first
    that is not."""
    rng = np.random.default_rng(4)
    for _ in range(200):
        p = rng.uniform(0, 0.1, size=int(rng.integers(1, 6)))
        alpha = float(rng.uniform(0.01, 0.1))
        order = np.argsort(p)
        expected = np.zeros(p.size, dtype=bool)
        for j, index in enumerate(order):
            if p[index] > alpha / (p.size - j):
                break
            expected[index] = True
        adjusted = holm(p)
        # Away from the boundary, where round-off in the multiplication could decide.
        near = np.abs(np.sort(p) * (p.size - np.arange(p.size)) - alpha) < 1e-12
        if not near.any():
            np.testing.assert_array_equal(adjusted <= alpha, expected)


def test_reader_upper_bound_is_clopper_pearson_over_readers() -> None:
    codes = np.array([0, 1] * 50, dtype=np.intp)
    predicted = codes.copy()
    predicted[:30] = 1 - predicted[:30]
    rng = np.random.default_rng(0)
    from veil.audit.probes import score_predictions

    scores = {"linear": score_predictions(codes, predicted), "mlp": score_predictions(codes, codes)}
    every = np.arange(codes.size)
    outcome = reader_test(predicted, codes, scores, "linear", rows=every, permutations=99, rng=rng)
    assert outcome.effect == pytest.approx(0.7 - 0.5)
    # The MLP reads every row: its one-sided bound is 1 (scipy.stats.binomtest's exact interval agrees).
    assert outcome.effect_upper == pytest.approx(1.0 - 0.5)
    only = reader_test(predicted, codes, {"linear": scores["linear"]}, "linear", rows=every, permutations=99, rng=rng)
    reference = stats.binomtest(70, 100).proportion_ci(confidence_level=1 - 2 * ALPHA, method="exact").high
    assert only.effect_upper == pytest.approx(reference - 0.5, rel=1e-9)


def test_audits_stored_before_say_the_tests_were_not_run(profiles_report: AuditReport) -> None:
    data = profiles_report.to_dict()
    assert data["independence"] is not None
    again = AuditReport.from_dict(data)
    assert again.independence == profiles_report.independence
    assert isinstance(again.independence, IndependenceAudit)
    del data["independence"]
    old = AuditReport.from_dict(data)
    assert old.independence is None
    assert NOT_RUN in old.format_table()
    assert "aggregated kernel two-sample test" in profiles_report.format_table()


@pytest.fixture(scope="module")
def profiles_report() -> AuditReport:
    from veil.audit import audit
    from veil.erasers import LEACE
    from veil.samples.harbourline import load_harbourline_profiles

    sample = load_harbourline_profiles()
    rows = np.arange(sample.embedding.shape[0])
    fit, held = rows % 5 != 0, rows % 5 == 0
    eraser = LEACE().fit(sample.embedding[fit], sample.pronoun[fit])
    return audit(eraser, sample.embedding[held], sample.pronoun[held], nonlinear=False)


def _with_only(report: AuditReport, rejected: str) -> AuditReport:
    """``report`` with its tests' Holm p-values set so that only the test ``rejected`` rejects."""
    family = report.independence
    assert family is not None
    tests = tuple(replace(test, p_holm=0.001 if test.name == rejected else 0.5) for test in family.tests)
    return replace(report, independence=replace(family, tests=tests))


@pytest.mark.parametrize(("rejected", "threat"), [("neighbours", "neighbours"), ("kernel", "nonlinear")])
def test_a_rejected_test_is_an_alert_for_its_threat_judged_as_claimed(
    profiles_report: AuditReport, rejected: str, threat: str
) -> None:
    report = _with_only(profiles_report, rejected)
    loose = AuditThresholds.from_dict({name: {"warn": 1.0, "alert": 1.0} for name in AuditThresholds().to_dict()})
    quiet = judge_audit(_with_only(profiles_report, "none"), loose, claims=("linear", threat))
    assert quiet.status != "alert"
    claimed = judge_audit(report, loose, claims=("linear", threat))
    assert claimed.status == "alert"
    assert claimed.threats[threat].status == "alert"
    assert any(TEST_LABELS[rejected] in reason for reason in claimed.reasons)
    # Not claimed: shown with its own status, the headline unchanged.
    shown = judge_audit(report, loose, claims=("linear",))
    assert shown.status == "ok"
    assert shown.threats[threat].status == "alert"
    assert f"not claimed: {THREATS[threat][0]} alert" in shown.sentence()


def test_the_report_shows_one_table_of_the_tests_each_line_with_its_meaning(profiles_report: AuditReport) -> None:
    family = profiles_report.independence
    assert family is not None
    page = independence_section(profiles_report)
    assert page.count("<tr data-test=") == len(family.tests)
    for test in family.tests:
        assert TEST_MEANINGS[test.name] in html.unescape(page)
    old = replace(profiles_report, independence=None)
    assert NOT_RUN in html.unescape(independence_section(old))


def test_the_readers_test_stays_calibrated_when_the_reader_is_chosen_by_its_hits() -> None:
    # Five readers that read nothing (random predictions), the named one chosen by its hits over every row, the
    # tested fold included. Testing it alone rejected in 10% of draws at 5%; the most hits of every reader on the
    # fold, against the same maximum under permuted labels, is exact: the false-positive rate at 0.05 stays within
    # its binomial bound (scipy.stats.binomtest, one-sided) and the p-values pass scipy.stats.kstest.
    rng = np.random.default_rng(17)
    p_values = []
    for _ in range(DRAWS):
        codes = rng.integers(0, 2, size=200).astype(np.intp)
        predicted = rng.integers(0, 2, size=(5, 200)).astype(np.intp)
        order = np.argsort(-np.count_nonzero(predicted == codes, axis=1), kind="stable")
        rows = np.arange(40)
        outcome = reader_test(predicted[order], codes, {}, "best", rows=rows, permutations=PERMUTATIONS, rng=rng)
        p_values.append(outcome.p_value)
    p = np.array(p_values)
    assert stats.kstest(p, "uniform").pvalue > 0.001
    rejected = int(np.count_nonzero(p < ALPHA))
    assert stats.binomtest(rejected, DRAWS, ALPHA, alternative="greater").pvalue > 0.01, rejected
