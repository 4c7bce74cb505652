"""The parts of the live-check measurements (reliability/livechecks.py) that decide what is planted and judged.

The group itself runs against real replicas in tests/test_reliability.py at
the quick size; these check that each planted change is the change it is
named for, and that the targets and the comparison of answers are judged as
documented.
"""

from __future__ import annotations

from collections import Counter

import numpy as np
import pytest
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import cross_val_score

from reliability.livechecks import (
    Tally,
    alarm_misses,
    compare_answers,
    detection_misses,
    rate,
    reason_key,
    tolerance,
)
from reliability.planted import (
    carry_along_hidden_direction,
    carrying_distance,
    hidden_direction,
    prior_shifted_rows,
    shift_along_leading_axis,
    shifted_shares,
    spread_along,
)
from reliability.workbench import planted_population
from veil.checks.reference import ReferenceStatistics
from veil.erasers import LEACE


def reference_of(x: np.ndarray) -> ReferenceStatistics:
    covariance = np.cov(x, rowvar=False, bias=True)
    values, vectors = np.linalg.eigh(covariance)
    order = np.argsort(values)[::-1]
    d = x.shape[1]
    return ReferenceStatistics(
        mean=x.mean(axis=0), eigenvalues=values[order], eigenvectors=vectors[:, order],
        erased_variance_share=0.0, class_priors=np.array([0.5, 0.5]), class_means=np.zeros((2, d)),
        probe_weights=np.zeros((1, d)), probe_bias=np.zeros(1),
    )  # fmt: skip


def test_the_mean_shift_is_one_standard_deviation_along_the_leading_axis() -> None:
    # A population built with a known covariance R diag(9, 4, 1) Rᵀ: its leading axis is R's first column, and
    # one standard deviation along it is 3 (the spectral decomposition of a covariance, a textbook fact).
    rotation, _ = np.linalg.qr(np.random.default_rng(0).normal(size=(3, 3)))
    x = np.random.default_rng(1).normal(size=(200_000, 3)) * [3.0, 2.0, 1.0] @ rotation.T
    moved = shift_along_leading_axis(x[:100], reference_of(x)) - x[:100].astype(np.float32)
    # The output is float32: each row's shift is the same vector to a float32 step of the rows' size.
    step = 4 * float(np.finfo(np.float32).eps) * float(np.abs(x[:100]).max() + 3)
    assert np.allclose(moved, moved[0], rtol=0, atol=step)
    shift = moved[0].astype(np.float64)
    axis = shift / np.linalg.norm(shift)
    # Its length is one standard deviation of the population along it, and it lies on the known axis (to the
    # sampling error of 200,000 rows; an eigenvector's sign is arbitrary).
    assert np.linalg.norm(shift) == pytest.approx(np.std(x @ axis), abs=step)
    assert abs(axis @ rotation[:, 0]) > 0.999
    assert np.linalg.norm(shift) == pytest.approx(3.0, abs=0.02)


def test_the_hidden_direction_survives_erasure_and_carries_the_attribute_again() -> None:
    x, z = planted_population(6000, seed=1)
    eraser = LEACE().fit(x[:4000], z[:4000])
    artifact = eraser.export()
    held = x[4000:]
    direction = hidden_direction(artifact, seed=3)
    # A unit direction the map passes unchanged.
    assert np.linalg.norm(direction) == pytest.approx(1.0, abs=8 * np.finfo(np.float64).eps)
    strength = 2 * spread_along(held, direction)
    before = artifact.apply(held.astype(np.float64))
    after = artifact.apply(held.astype(np.float64) + strength * direction)
    # Both sides go through U Vᵀ(x − μ): they differ by the round-off of d-term sums of that size.
    mapping = artifact.map
    scale = float(np.abs(held).max()) * (1 + np.linalg.norm(mapping.u) * np.linalg.norm(mapping.v))
    atol = 4 * held.shape[1] * np.finfo(np.float64).eps * scale
    assert np.allclose(after - before, strength * direction, rtol=0, atol=atol)
    moved_x, moved = carry_along_hidden_direction(
        held, z[4000:], direction, share=0.2, strength=strength, rng=np.random.default_rng(4)
    )
    assert moved.size == 400
    untouched = np.setdiff1d(np.arange(held.shape[0]), moved)
    assert np.array_equal(moved_x[untouched], held[untouched])
    # After erasure a scikit-learn probe reads the attribute on the rows moved, and cannot on the others.
    erased = artifact.apply(moved_x)
    on_moved = cross_val_score(LogisticRegression(max_iter=2000), erased[moved], z[4000:][moved], cv=5).mean()
    on_rest = cross_val_score(LogisticRegression(max_iter=2000), erased[untouched], z[4000:][untouched], cv=5).mean()
    assert on_moved > 0.95
    assert on_rest < 0.6


def test_the_carrying_distance_is_half_the_class_mean_distance() -> None:
    # Two classes of a known layout: class means at −1 and +3 along the first axis (a distance of 4, half of it 2),
    # the rows symmetric about each mean so the sample means are the layout's exactly.
    offsets = np.array([[0.5, 1.0], [-0.5, -1.0], [0.5, -1.0], [-0.5, 1.0]])
    x = np.vstack([offsets + np.array([-1.0, 0.0]), offsets + np.array([3.0, 0.0]), offsets + np.array([3.0, 0.0])])
    labels = np.array(["a"] * 4 + ["b"] * 8)
    assert carrying_distance(x, labels) == pytest.approx(2.0, abs=8 * np.finfo(np.float64).eps)
    # Every row moved ± that distance by class along a direction the classes do not differ on: along it their
    # means are then as far apart as the raw class means were (the first class goes towards +direction).
    moved, rows = carry_along_hidden_direction(
        x, labels, np.array([0.0, 1.0]), share=1.0, strength=2.0, rng=np.random.default_rng(0)
    )
    assert rows.size == 12
    gap = moved[labels == "a"].mean(axis=0) - moved[labels == "b"].mean(axis=0)
    # float32 rows of size a few: a float32 step of them.
    assert gap.tolist() == pytest.approx([-4.0, 4.0], abs=16 * float(np.finfo(np.float32).eps))
    with pytest.raises(ValueError, match="two classes"):
        carrying_distance(x[:4], labels[:4])


def test_the_prior_shift_is_the_distance_asked_for() -> None:
    priors = np.array([0.51, 0.49])
    shares = shifted_shares(priors, 0.2)
    # Total variation: half the L1 distance between the two distributions.
    assert 0.5 * np.abs(shares - priors).sum() == pytest.approx(0.2, abs=4 * np.finfo(float).eps)
    assert shares.sum() == pytest.approx(1.0, abs=4 * np.finfo(float).eps)
    three = shifted_shares(np.array([0.46, 0.29, 0.25]), 0.5)
    assert three.tolist() == pytest.approx([0.0, 0.25, 0.75], abs=1e-12)
    with pytest.raises(ValueError, match="cannot be made"):
        shifted_shares(priors, 0.6)
    labels = np.array(["he"] * 600 + ["she"] * 400)
    for n in (100, 300, 301):
        rows = prior_shifted_rows(labels, ["he", "she"], priors, 0.2, n, np.random.default_rng(n))
        assert np.unique(rows).size == n
        counts = Counter(labels[rows].tolist())
        assert counts["he"] + counts["she"] == n
        # In whole rows the distance is at least the one asked for, and less than one row more (compared in
        # integers: 100 · she − 49 · n ≥ 20 · n, i.e. she / n − 0.49 ≥ 0.2).
        assert 20 * n <= 100 * counts["she"] - 49 * n < 20 * n + 100


def tally_of(**statuses: int) -> Tally:
    return Tally(statuses=Counter(statuses))


def test_targets_are_judged_in_whole_counts() -> None:
    # At exactly 1% alerts and 5% warn-or-alert the targets hold; one check more misses each.
    assert alarm_misses(tally_of(ok=475, warn=20, alert=5)) == []
    assert alarm_misses(tally_of(ok=475, warn=19, alert=6)) == ["alerts on 1.2% of checks: target 1%"]
    assert alarm_misses(tally_of(ok=474, warn=21, alert=5)) == ["warn or alert on 5.2%: target 5%"]
    assert detection_misses(tally_of(alert=95, warn=5)) == []
    assert detection_misses(tally_of(alert=94, warn=6)) == ["alerted in 94% of checks: target 95%"]


def test_a_rate_carries_its_exact_interval() -> None:
    # With no event in n trials, the exact 95% interval's upper end is 1 − 0.025^(1/n) (a closed form of the
    # Clopper–Pearson bound): 30.8% for 10 trials.
    assert rate(0, 10) == "0 (0.0%, 95% interval 0.0–30.8%)"


def test_reasons_are_keyed_by_attribute_and_figure() -> None:
    assert reason_key("age_bracket: leakage_gap 0.071 reaches alert (0.05)") == "age_bracket: leakage_gap"
    assert reason_key("prior_shift 0.213 reaches alert (0.2)") == "prior_shift"
    assert reason_key("pronoun&age_bracket: prior_shift 0.3 reaches warn (0.1)") == "pronoun&age_bracket: prior_shift"


def test_answers_are_compared_leaf_by_leaf_at_the_data_type_s_tolerance() -> None:
    merged = {"status": "ok", "mean_shift": 0.25, "leakage": {"accuracy": 0.5}, "ranking": [1.0, 2.0]}
    assert compare_answers(merged, merged) == (5, 0.0, [])
    close = {**merged, "mean_shift": 0.25 + tolerance(0.25, 0.25) / 2}
    assert compare_answers(merged, close)[2] == []
    one_row = {**merged, "leakage": {"accuracy": 0.5 + 1 / 1000}}
    assert compare_answers(merged, one_row)[2] == ["leakage.accuracy: 0.5 merged, 0.501 on one replica"]
    assert compare_answers(merged, {**merged, "status": "warn"})[2] == ["status: 'ok' merged, 'warn' on one replica"]
    assert compare_answers(merged, {"status": "ok"})[2][0] == "leakage.accuracy only in one answer"
