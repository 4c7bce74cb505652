"""Fitting in chunks, or merging the moments of separate parts, gives the same eraser as one fit."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from numpy.typing import NDArray
from sklearn.exceptions import ConvergenceWarning

from veil import INLP, LEACE, MeanProjection, MomentState
from veil.erasers import LinearErasure
from veil.maps import moments as moments_module
from veil.maps.attribute import encode_attribute

from .conftest import planted

RTOL = 1e-9


def _assert_same_map(a: LinearErasure, b: LinearErasure, x: NDArray[np.float64]) -> None:
    # U and V are defined up to a rotation of the basis; the map itself is unique.
    assert a.rank_ == b.rank_
    ua, ub = a.map_.u @ a.map_.v.T, b.map_.u @ b.map_.v.T
    assert np.linalg.norm(ua - ub) <= RTOL * max(np.linalg.norm(ua), 1.0)
    np.testing.assert_allclose(a.mean_, b.mean_, rtol=RTOL, atol=RTOL * np.abs(x).max())
    ta, tb = a.transform(x), b.transform(x)
    assert np.linalg.norm(ta - tb) <= RTOL * np.linalg.norm(ta)


@pytest.mark.parametrize("factory", [LEACE, MeanProjection])
@pytest.mark.parametrize("chunk", [1, 7, 250, 1000])
def test_partial_fit_over_chunks_equals_fit(factory: type[LinearErasure], chunk: int) -> None:
    x, z = planted(n=1200, d=9, seed=2)
    x = x + 1e3  # an offset far from zero: the pairwise update must not lose digits
    whole = factory().fit(x, z)
    streamed = factory()
    for start in range(0, len(x), chunk):
        streamed.partial_fit(x[start : start + chunk], z[start : start + chunk])
    _assert_same_map(whole, streamed, x)


def test_classes_may_first_appear_in_later_chunks() -> None:
    x, z = planted(n=900, d=6, seed=3)
    labels = np.array(["a", "b", "c"])[np.where(z == 1, 2, np.arange(900) % 2)]
    order = np.argsort(labels, kind="stable")  # all "a" rows, then "b", then "c"
    whole = LEACE().fit(x, labels)
    streamed = LEACE()
    for rows in np.array_split(order, 9):
        streamed.partial_fit(x[rows], labels[rows])
    _assert_same_map(whole, streamed, x)
    assert list(streamed.classes_) == ["a", "b", "c"]


def test_merging_two_partial_states_equals_one_fit() -> None:
    x, z = planted(n=1000, d=8, seed=4)
    left = MomentState.from_batch(x[:370], encode_attribute(z[:370], 370))
    right = MomentState.from_batch(x[370:], encode_attribute(z[370:], 630))
    merged = LEACE().fit_moments(left.merge(right))
    _assert_same_map(LEACE().fit(x, z), merged, x)


def test_merged_moments_match_numpy_statistics() -> None:
    # Reference: numpy.cov (population normalisation) over all rows at once.
    x, z = planted(n=500, d=5, seed=5)
    state = MomentState.empty(5, 2, np.array([0, 1]))
    for rows in np.array_split(np.arange(500), 6):
        state = state.merge(MomentState.from_batch(x[rows], encode_attribute(z[rows], rows.size)))
    np.testing.assert_allclose(state.covariance_xx, np.cov(x.T, bias=True), rtol=1e-12)
    np.testing.assert_allclose(state.class_means, np.stack([x[z == 0].mean(0), x[z == 1].mean(0)]), rtol=1e-12)
    np.testing.assert_allclose(state.class_priors, [np.mean(z == 0), np.mean(z == 1)], rtol=1e-12)


def test_inlp_moments_partial_fit_equals_fit() -> None:
    x, z = planted(n=4000, d=10, seed=6)
    whole = INLP(classifier="moments", max_iter=8, tol=0.0, random_state=3).fit(x, z)
    streamed = INLP(classifier="moments", max_iter=8, tol=0.0, random_state=3)
    for rows in np.array_split(np.arange(4000), 13):
        streamed.partial_fit(x[rows], z[rows])
    _assert_same_map(whole, streamed, x)
    assert [h["rank"] for h in whole.history_] == [h["rank"] for h in streamed.history_]


def test_partial_fit_is_only_offered_by_the_moments_classifier() -> None:
    assert hasattr(INLP(classifier="moments"), "partial_fit")
    assert not hasattr(INLP(classifier="logistic"), "partial_fit")


def test_the_same_attribute_of_another_type_cannot_be_merged() -> None:
    x, _ = planted(n=40, d=3)
    eraser = LEACE().partial_fit(x[:20], np.arange(20) % 2)
    with pytest.raises(ValueError, match="changed type"):
        eraser.partial_fit(x[20:], np.array(["a", "b"] * 10))


def test_only_a_whole_fit_warns_that_inlp_did_not_converge() -> None:
    x, z = planted(n=2000, d=10, seed=7)
    streamed = INLP(classifier="moments", max_iter=1, tol=0.0, random_state=0)
    with warnings.catch_warnings():
        warnings.simplefilter("error", ConvergenceWarning)
        for rows in np.array_split(np.arange(2000), 4):
            streamed.partial_fit(x[rows], z[rows])
    assert not streamed.converged_
    with pytest.warns(ConvergenceWarning, match="raise max_iter"):
        INLP(classifier="moments", max_iter=1, tol=0.0, random_state=0).fit(x, z)


def test_large_batches_are_taken_in_blocks_with_the_same_moments(monkeypatch: pytest.MonkeyPatch) -> None:
    # Reference: numpy's own mean and (1/n) covariance of the whole batch at once.
    monkeypatch.setattr(moments_module, "BLOCK_ROWS", 64)
    rng = np.random.default_rng(11)
    x = rng.normal(size=(1000, 6)) + 50.0
    z = rng.integers(0, 3, 1000)
    state = moments_module.MomentState.from_batch(x, encode_attribute(z, 1000))
    assert state.count == 1000
    np.testing.assert_allclose(state.mean_x, x.mean(axis=0), rtol=1e-12)
    np.testing.assert_allclose(state.covariance_xx, np.cov(x.T, bias=True), rtol=1e-9)
