"""LEACE's defining properties (Belrose et al., 2023, "LEACE: Perfect linear concept erasure in closed form").

On the fitting data: the erased class means coincide, ``Cov(x', z) = 0``, and
no affine eraser that achieves this moves the data less in mean squared
distance (the least-squares optimality the theorem states; recalled from
memory as holding for every p.s.d. norm, tested here for the Euclidean one).
"""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from numpy.typing import NDArray
from scipy import linalg

from veil import INLP, LEACE, MeanProjection
from veil.erasers import LinearErasure


def _data(seed: int, n: int, d: int, classes: int) -> tuple[NDArray[np.float64], NDArray[np.int64]]:
    rng = np.random.default_rng(seed)
    z = np.arange(n) % classes  # every class present
    rng.shuffle(z)
    mixing = rng.normal(size=(d, d)) * rng.uniform(0.1, 3.0, size=d)
    offsets = rng.normal(scale=rng.uniform(0.2, 3.0), size=(classes, d))
    return rng.normal(size=(n, d)) @ mixing + offsets[z], z


def _cross_covariance(x: NDArray[np.floating], z: NDArray[np.int64]) -> NDArray[np.float64]:
    onehot = np.eye(int(z.max()) + 1)[z]
    return (x - x.mean(0)).T @ (onehot - onehot.mean(0)) / x.shape[0]


def _distortion(eraser: LinearErasure, x: NDArray[np.float64]) -> float:
    return float(np.mean(np.sum((eraser.transform(x) - x) ** 2, axis=1)))


def _is_guarded(eraser: LinearErasure, x: NDArray[np.float64], z: NDArray[np.int64]) -> bool:
    before = np.linalg.norm(_cross_covariance(x, z))
    return bool(np.linalg.norm(_cross_covariance(eraser.transform(x), z)) <= 1e-8 * before)


cases = st.tuples(st.integers(0, 2**31 - 1), st.integers(60, 400), st.integers(2, 12), st.integers(2, 4))


@settings(max_examples=40, deadline=None)
@given(cases)
def test_erased_class_means_coincide_and_cross_covariance_vanishes(case: tuple[int, int, int, int]) -> None:
    seed, n, d, classes = case
    x, z = _data(seed, n, d, classes)
    erased = LEACE().fit(x, z).transform(x)
    scale = np.linalg.norm(_cross_covariance(x, z))
    assert np.linalg.norm(_cross_covariance(erased, z)) <= 1e-8 * scale
    means = np.stack([erased[z == c].mean(0) for c in range(classes)])
    spread = np.sqrt(np.mean(np.sum((x - x.mean(0)) ** 2, axis=1)))
    assert np.max(np.abs(means - means.mean(0))) <= 1e-8 * spread


@settings(max_examples=30, deadline=None)
@given(cases, st.integers(0, 3))
def test_no_guarded_eraser_here_moves_the_data_less(case: tuple[int, int, int, int], extra: int) -> None:
    seed, n, d, classes = case
    x, z = _data(seed, n, d, classes)
    leace = LEACE().fit(x, z)
    assert _is_guarded(leace, x, z)
    rivals: list[LinearErasure] = [
        MeanProjection().fit(x, z),
        INLP(classifier="moments", max_iter=d, tol=0.0, random_state=seed).fit(x, z),
    ]
    for rival in rivals:
        if _is_guarded(rival, x, z):
            assert _distortion(leace, x) <= _distortion(rival, x) * (1 + 1e-9) + 1e-12

    # A guarded orthogonal projection built independently of veil: remove the
    # span of Cov(x, z) plus ``extra`` random directions (scipy.linalg.orth).
    rng = np.random.default_rng(seed + 1)
    basis = linalg.orth(np.column_stack([_cross_covariance(x, z), rng.normal(size=(d, extra))]))
    centred = x - x.mean(0)
    projected = x - centred @ basis @ basis.T
    assert np.linalg.norm(_cross_covariance(projected, z)) <= 1e-8 * np.linalg.norm(_cross_covariance(x, z))
    assert _distortion(leace, x) <= float(np.mean(np.sum((projected - x) ** 2, axis=1))) * (1 + 1e-9) + 1e-12


def test_rank_deficient_covariance_is_handled() -> None:
    # d > n and duplicated features: Cov(x) is singular; the eigenvalue
    # cut-off must keep the erasure exact on the data's span.
    rng = np.random.default_rng(3)
    z = np.arange(30) % 2
    base = rng.normal(size=(30, 40)) + 2.0 * z[:, None]
    x = np.column_stack([base, base[:, :5]])
    eraser = LEACE().fit(x, z)
    erased = eraser.transform(x)
    assert np.all(np.isfinite(erased))
    assert np.linalg.norm(_cross_covariance(erased, z)) <= 1e-8 * np.linalg.norm(_cross_covariance(x, z))
    assert eraser.rank_ == 1
