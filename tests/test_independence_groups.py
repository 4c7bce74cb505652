"""The independence tests with a group column: labels permuted by whole groups, neighbours from other groups.

Rows of a group share their place and their label; a test of rows permuted one by one then asks whether rows are
exchangeable, not whether the attribute leaks beyond the group.  Small rows and few permutations keep it cheap.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import asdict

import numpy as np
import pytest
from numpy.typing import NDArray
from scipy import stats
from sklearn.discriminant_analysis import LinearDiscriminantAnalysis
from sklearn.model_selection import StratifiedGroupKFold, cross_val_predict

from veil.audit.geometry import nearest_neighbours
from veil.audit.independence import (
    PERMUTE_GROUPS,
    PERMUTE_WITHIN_GROUPS,
    ROWS,
    Grouping,
    group_grouping,
    kernel_test,
    neighbour_test,
    permuted_codes,
    reader_test,
)
from veil.audit.independence_report import IndependenceTest
from veil.audit.independence_run import IndependenceSettings, independence_audit
from veil.audit.power import PowerSettings, draw

DRAWS = 200
GROUPS = 24
DIM = 3
PERMUTATIONS = 99
ALPHA = 0.05


def _grouped(
    rng: np.random.Generator, shared: float = 0.0
) -> tuple[NDArray[np.float64], NDArray[np.intp], NDArray[np.intp]]:
    """Groups of 2 to 8 rows, each with its own offset and one label of its own (half the groups each class);
    ``shared`` moves every group of class 1 along the first coordinate: the only dependence beyond the group."""
    sizes = rng.integers(2, 9, size=GROUPS)
    groups = np.repeat(np.arange(GROUPS), sizes).astype(np.intp)
    labels = rng.permutation(np.arange(GROUPS) % 2).astype(np.intp)
    offsets = 2.0 * rng.standard_normal((GROUPS, DIM))
    offsets[:, 0] += shared * labels
    x = offsets[groups] + 0.5 * rng.standard_normal((groups.size, DIM))
    return x, labels[groups], groups


def _group_predictions(
    x: NDArray[np.floating], codes: NDArray[np.intp], groups: NDArray[np.intp]
) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
    """Held-out predictions of scikit-learn's LDA over 4 folds that keep each group in one fold, and the first
    fold's rows (scikit-learn's StratifiedGroupKFold)."""
    folds = StratifiedGroupKFold(n_splits=4, shuffle=True, random_state=0)
    predicted = cross_val_predict(LinearDiscriminantAnalysis(), x, codes, cv=folds, groups=groups)
    return np.asarray(predicted, dtype=np.intp), np.sort(next(iter(folds.split(x, codes, groups)))[1])


def _p_value(
    name: str, x: NDArray[np.float64], codes: NDArray[np.intp], grouping: Grouping, rng: np.random.Generator
) -> float:
    if name == "kernel":
        return kernel_test(x, codes, permutations=PERMUTATIONS, rng=rng, bootstrap=0, grouping=grouping).p_value
    if name == "neighbours":
        found = nearest_neighbours(x, 10, grouping.apart)
        return neighbour_test(found, codes, permutations=PERMUTATIONS, rng=rng, bootstrap=0, grouping=grouping).p_value
    assert grouping.apart is not None
    predicted, rows = _group_predictions(x, codes, grouping.apart)
    return reader_test(
        predicted, codes, {}, "linear", rows=rows, permutations=PERMUTATIONS, rng=rng, grouping=grouping
    ).p_value


@pytest.mark.parametrize("name", ["kernel", "neighbours", "readers"])
def test_group_permutation_is_calibrated_where_the_row_permutation_over_rejects(name: str) -> None:
    rng = np.random.default_rng(17)
    ours, by_rows = [], []
    for _ in range(DRAWS):
        x, codes, groups = _grouped(rng)
        grouping = group_grouping(codes, groups)
        assert grouping.permutation == PERMUTE_GROUPS
        ours.append(_p_value(name, x, codes, grouping, rng))
        if name != "readers":
            by_rows.append(_p_value(name, x, codes, ROWS, rng))
    p = np.asarray(ours)
    # Uniform p-values: scipy.stats.kstest against the uniform distribution does not reject at 1% ...
    assert stats.kstest(p, "uniform").pvalue > 0.01
    # ... and the false-positive rate at 0.05 lies within its binomial interval (scipy.stats.binomtest).
    assert stats.binomtest(int(np.count_nonzero(p < ALPHA)), DRAWS, ALPHA).pvalue > 0.01
    if by_rows:
        # The same statistic with rows permuted one by one rejects far more often than 5% on the same data
        # (scipy.stats.binomtest, one-sided): the reason for the group-level permutation.
        rejected = int(np.count_nonzero(np.asarray(by_rows) < ALPHA))
        assert stats.binomtest(rejected, DRAWS, ALPHA, alternative="greater").pvalue < 1e-6, rejected


@pytest.mark.parametrize("name", ["kernel", "neighbours", "readers"])
def test_an_attribute_shared_across_groups_is_detected(name: str) -> None:
    rng = np.random.default_rng(19)
    draws = 40
    rejected = 0
    for _ in range(draws):
        x, codes, groups = _grouped(rng, shared=6.0)
        rejected += _p_value(name, x, codes, group_grouping(codes, groups), rng) < ALPHA
    # Far above the 5% of no dependence (scipy.stats.binomtest, one-sided).
    assert stats.binomtest(rejected, draws, ALPHA, alternative="greater").pvalue < 1e-6, rejected


def _assert_between_scipy_tails(
    ours: float, statistic: Callable[[NDArray[np.intp]], float], group_labels: NDArray[np.intp]
) -> None:
    """``ours`` lies between the upper tails of scipy.stats.permutation_test's null distribution of the groups'
    labels permuted among the groups, with ties counted (its own p-value) and without them."""
    result = stats.permutation_test(
        (group_labels,), statistic, permutation_type="pairings", alternative="greater", n_resamples=4000,
        random_state=1,
    )  # fmt: skip
    null = np.asarray(result.null_distribution)
    with_ties = (np.count_nonzero(null >= result.statistic) + 1) / (null.size + 1)
    without = np.count_nonzero(null > result.statistic) / (null.size + 1)
    # Monte Carlo error of 4000 permutations on each side: 4 standard errors of the larger p-value.
    slack = 4 * np.sqrt(with_ties * (1 - with_ties) / 4000)
    assert without - slack <= ours <= with_ties + slack


def test_group_neighbour_p_value_agrees_with_scipy_permutation_test_of_group_labels() -> None:
    rng = np.random.default_rng(23)
    x, codes, groups = _grouped(rng, shared=1.5)
    grouping = group_grouping(codes, groups)
    found = nearest_neighbours(x, 10, groups)
    assert not np.any(groups[found] == groups[:, None])
    ours = neighbour_test(found, codes, permutations=4000, rng=rng, bootstrap=0, grouping=grouping).p_value
    group_labels = np.array([codes[groups == g][0] for g in range(GROUPS)], dtype=np.intp)

    def same(labels: NDArray[np.intp]) -> float:
        rows = labels[groups]
        return float(np.count_nonzero(rows[found] == rows[:, None]))

    _assert_between_scipy_tails(ours, same, group_labels)


def test_group_reader_p_value_agrees_with_scipy_permutation_test_of_group_labels() -> None:
    rng = np.random.default_rng(29)
    x, codes, groups = _grouped(rng, shared=1.5)
    predicted, rows = _group_predictions(x, codes, groups)
    grouping = group_grouping(codes, groups)
    ours = reader_test(predicted, codes, {}, "linear", rows=rows, permutations=4000, rng=rng, grouping=grouping).p_value
    fold_groups = np.unique(groups[rows])
    group_labels = np.array([codes[groups == g][0] for g in fold_groups], dtype=np.intp)
    index = np.searchsorted(fold_groups, groups[rows])

    def hits(labels: NDArray[np.intp]) -> float:
        return float(np.count_nonzero(labels[index] == predicted[rows]))

    _assert_between_scipy_tails(ours, hits, group_labels)


def test_group_permutations_move_each_group_label_as_one_block() -> None:
    rng = np.random.default_rng(31)
    _, codes, groups = _grouped(rng)
    permuted = permuted_codes(codes, 50, rng, blocks=groups)
    sizes = np.bincount(groups)
    observed = np.sort(np.array([codes[groups == g][0] for g in range(GROUPS)]))
    for labels in permuted:
        # Every group keeps one label, and the groups' labels are the observed ones reordered.
        per_group = [np.unique(labels[groups == g]) for g in range(GROUPS)]
        assert all(values.size == 1 for values in per_group)
        assert np.array_equal(np.sort(np.concatenate(per_group)), observed)
    # Class counts move with the sizes of the groups that change class: not a row permutation.
    assert len({int(np.count_nonzero(labels)) for labels in permuted}) > 1
    assert sizes.min() < sizes.max()


def test_a_group_holding_two_classes_falls_back_to_permuting_within_groups() -> None:
    rng = np.random.default_rng(37)
    x, codes, groups = _grouped(rng)
    mixed = codes.copy()
    first = np.flatnonzero(groups == 0)
    mixed[first[0]] = 1 - mixed[first[0]]
    grouping = group_grouping(mixed, groups)
    assert grouping.permutation == PERMUTE_WITHIN_GROUPS
    assert grouping.blocks is None
    # Within each group: every permuted labelling keeps each group's class counts.
    for labels in permuted_codes(mixed, 20, rng, grouping.within):
        assert np.array_equal(
            np.bincount(groups[labels == 1], minlength=GROUPS), np.bincount(groups[mixed == 1], minlength=GROUPS)
        )
    outcome = kernel_test(x, mixed, permutations=PERMUTATIONS, rng=rng, bootstrap=0, grouping=grouping)
    assert outcome.permutation == PERMUTE_WITHIN_GROUPS


def test_power_draws_take_whole_groups() -> None:
    rng = np.random.default_rng(41)
    _, codes, groups = _grouped(rng)
    chosen = draw(codes, rng, groups)
    taken = np.unique(groups[chosen])
    # Every row of a drawn group is drawn, no row of another, and each class's groups are drawn.
    assert np.array_equal(chosen, np.flatnonzero(np.isin(groups, taken)))
    assert set(codes[chosen]) == {0, 1}


def test_the_audit_records_how_each_test_permuted() -> None:
    rng = np.random.default_rng(43)
    sizes = rng.integers(3, 7, size=64)
    groups = np.repeat(np.arange(64), sizes).astype(np.intp)
    labels = rng.permutation(np.arange(64) % 2).astype(np.intp)
    erased = 2.0 * rng.standard_normal((64, DIM))[groups] + 0.5 * rng.standard_normal((groups.size, DIM))
    raw = erased.copy()
    raw[:, 0] += 10.0 * labels[groups]
    settings = IndependenceSettings(
        permutations=PERMUTATIONS, power=PowerSettings(grid=(1.0,), draws=4, permutations=99, readers=False),
        thorough=False,
    )  # fmt: skip
    audit = independence_audit(
        raw, erased, labels[groups], neighbours=nearest_neighbours(erased, 10),
        find_neighbours=lambda x, apart: nearest_neighbours(x, 10, apart), reader=None, settings=settings, seed=0,
        grouped=groups,
    )  # fmt: skip
    assert [test.permutation for test in audit.tests] == [PERMUTE_GROUPS, PERMUTE_GROUPS]
    # Planted back in full, the leak shared across groups is found in whole-group draws.
    assert all(test.power_measured and test.smallest_strength == 1.0 for test in audit.tests), audit.tests
    assert "from other groups" in audit.tests[1].detail
    # A record stored before the field reads as row by row (the context tests: within each context value).
    old = {key: value for key, value in asdict(audit.tests[0]).items() if key != "permutation"}
    assert IndependenceTest.from_dict(old).permutation == "rows"
    assert IndependenceTest.from_dict({**old, "name": "kernel-context"}).permutation == "within context values"


def test_with_a_group_column_the_tests_within_a_context_are_left_out() -> None:
    # Rows of one group share position and label; a row-by-row permutation within each context value would
    # reject where nothing leaks beyond the group, so the family holds the tests across groups only.
    rng = np.random.default_rng(5)
    x, codes, groups = _grouped(rng)
    context = rng.integers(0, 2, size=codes.size).astype(np.intp)
    settings = IndependenceSettings(permutations=PERMUTATIONS, power=None, thorough=False)
    audit = independence_audit(
        x, x, codes, neighbours=nearest_neighbours(x, 10),
        find_neighbours=lambda x, apart=None: nearest_neighbours(x, 10, apart), reader=None, settings=settings,
        seed=0, groups=context, grouped=groups,
    )  # fmt: skip
    assert [test.permutation for test in audit.tests] == [PERMUTE_GROUPS, PERMUTE_GROUPS]
    alone = independence_audit(
        x, x, codes, neighbours=nearest_neighbours(x, 10),
        find_neighbours=lambda x, apart=None: nearest_neighbours(x, 10, apart), reader=None, settings=settings,
        seed=0, groups=context,
    )  # fmt: skip
    assert len(alone.tests) == 4  # without a group column the context's two tests run beside the family's two
