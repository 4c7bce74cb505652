"""Round-off never decides a rank or a map: BLAS threads, chunk order, input precision, perturbed moments."""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pytest
from numpy.typing import NDArray
from sklearn.exceptions import ConvergenceWarning
from threadpoolctl import threadpool_limits

from veil import INLP, LEACE, MeanProjection, MomentState
from veil.erasers import LinearErasure, MomentErasure
from veil.samples.harbourline import load_harbourline_profiles

MOMENT_METHODS: dict[str, Callable[[], MomentErasure]] = {"leace": LEACE, "meanproj": MeanProjection}
ALL_METHODS: dict[str, Callable[[], LinearErasure]] = {
    **MOMENT_METHODS,
    "inlp-moments": lambda: INLP(classifier="moments", max_iter=30, random_state=0),
}


def regions(n: int = 6000, d: int = 12, seed: int = 21) -> tuple[NDArray[np.float32], NDArray[np.str_]]:
    """Three classes, each with its own mean offset: the data on which fresh clones kept rank 3 instead of 2."""
    rng = np.random.default_rng(seed)
    z = np.array(["north", "south", "west"])[rng.integers(0, 3, n)]
    x = rng.normal(size=(n, d)) @ rng.normal(size=(d, d)) / np.sqrt(d)
    x += np.where(z == "south", 1.0, 0.0)[:, None] * rng.normal(size=d) + np.where(z == "west", 1.0, 0.0)[:, None]
    return x.astype(np.float32), z


def age_brackets() -> tuple[NDArray[np.float32], NDArray[np.str_]]:
    """The committed sample (384-d MiniLM embeddings, 3 dead coordinates) with its 3-class age bracket."""
    sample = load_harbourline_profiles()
    return sample.embedding, sample.age_bracket


DATA = {"regions": regions, "age-brackets": age_brackets}


def assert_same_map(first: LinearErasure, second: LinearErasure) -> None:
    assert first.rank_ == second.rank_
    a_first, b_first = first.map_.to_dense()
    a_second, b_second = second.map_.to_dense()
    np.testing.assert_allclose(a_first, a_second, rtol=0, atol=1e-9)
    np.testing.assert_allclose(b_first, b_second, rtol=0, atol=1e-9)


def perturbed(moments: MomentState, relative: float, seed: int = 0) -> MomentState:
    """The same moments with rounding-sized relative noise, as another summation order or BLAS kernel gives.

    The noise also breaks the exact zero that one-hot columns leave in ``Cov(x, z) 1``, which is what decided
    the rank on other machines.
    """
    rng = np.random.default_rng(seed)
    noise_xx = rng.normal(size=moments.comoment_xx.shape)
    return MomentState(
        count=moments.count,
        mean_x=moments.mean_x,
        mean_z=moments.mean_z,
        comoment_xx=moments.comoment_xx * (1 + relative * (noise_xx + noise_xx.T) / 2),
        comoment_xz=moments.comoment_xz * (1 + relative * rng.normal(size=moments.comoment_xz.shape)),
        comoment_zz=moments.comoment_zz,
        labels=moments.labels,
    )


@pytest.mark.parametrize("data", DATA)
@pytest.mark.parametrize("method", MOMENT_METHODS)
def test_a_categorical_attribute_keeps_c_minus_1_directions_under_rounding_noise(data: str, method: str) -> None:
    x, z = DATA[data]()
    exact = MOMENT_METHODS[method]().fit(x, z)
    # The indicators of C classes sum to one on every row, so Cov(x, z) has rank C - 1 at most (linear algebra);
    # with three well-separated classes it is exactly 2.
    assert exact.rank_ == np.unique(z).size - 1
    for relative in (1e-14, 1e-13, 1e-12):
        noisy = MOMENT_METHODS[method]().fit_moments(perturbed(exact.moments_, relative))
        assert_same_map(exact, noisy)


@pytest.mark.parametrize("data", DATA)
@pytest.mark.parametrize("method", ALL_METHODS)
def test_one_and_two_blas_threads_give_the_same_rank_and_map(data: str, method: str) -> None:
    x, z = DATA[data]()
    with threadpool_limits(limits=1, user_api="blas"):
        single = ALL_METHODS[method]().fit(x, z)
    with threadpool_limits(limits=2, user_api="blas"):
        double = ALL_METHODS[method]().fit(x, z)
    assert_same_map(single, double)


@pytest.mark.parametrize("data", DATA)
@pytest.mark.parametrize("method", ALL_METHODS)
def test_float32_and_float64_input_give_the_same_rank_and_map(data: str, method: str) -> None:
    x, z = DATA[data]()
    assert_same_map(ALL_METHODS[method]().fit(x, z), ALL_METHODS[method]().fit(x.astype(np.float64), z))


@pytest.mark.parametrize("data", DATA)
@pytest.mark.parametrize("method", MOMENT_METHODS)
def test_chunks_in_any_order_give_the_same_rank_and_map(data: str, method: str) -> None:
    x, z = DATA[data]()
    whole = MOMENT_METHODS[method]().fit(x, z)
    chunks = np.array_split(np.arange(x.shape[0]), 7)
    for seed in range(3):
        streamed = MOMENT_METHODS[method]()
        for index in np.random.default_rng(seed).permutation(len(chunks)):
            streamed.partial_fit(x[chunks[index]], z[chunks[index]])
        assert_same_map(whole, streamed)


@pytest.mark.parametrize("method", MOMENT_METHODS)
def test_a_numeric_attribute_keeps_at_most_its_independent_columns_under_rounding_noise(method: str) -> None:
    x, z = regions()
    labels, codes = np.unique(z, return_inverse=True)
    one_hot = np.eye(labels.size)[codes]
    rng = np.random.default_rng(3)
    continuous = np.column_stack([x[:, 0] + rng.normal(size=x.shape[0]), rng.normal(size=x.shape[0])])
    # One-hot columns given as a numeric matrix still sum to one: Cov(z) has rank C - 1, and so has the map.
    # Two continuous columns give at most two directions, whatever the noise (linear algebra).
    for attribute, bound in ((one_hot, labels.size - 1), (continuous, 2)):
        exact = MOMENT_METHODS[method]().fit(x, attribute)
        assert exact.rank_ == bound
        for relative in (1e-14, 1e-13, 1e-12):
            assert_same_map(exact, MOMENT_METHODS[method]().fit_moments(perturbed(exact.moments_, relative)))


@pytest.mark.parametrize("classifier", ["logistic", "moments"])
def test_inlp_adds_at_most_c_minus_1_directions_per_classifier(classifier: str) -> None:
    x, z = regions()
    inlp = INLP(classifier=classifier, max_iter=5, random_state=0, close_with_mean_projection=False)
    with pytest.warns(ConvergenceWarning):
        inlp.fit(x, z)
    # A softmax or an argmax of class scores does not change when one vector is added to every class's weights
    # (scikit-learn's multinomial LogisticRegression, the moments discriminant), so a classifier of C classes
    # reads C - 1 directions; a third one would be the solver's or the rounding's.
    ranks = [0] + [entry["rank"] for entry in inlp.history_]
    assert max(np.diff(ranks)) == np.unique(z).size - 1
