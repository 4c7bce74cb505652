"""R-LACE's step onto the Fantope {0 ⪯ P ⪯ I, tr P = k} is the Euclidean projection.

Checked against the projection theorem: P* is the projection of M onto a
closed convex set C exactly when ⟨M - P*, Q - P*⟩ ≤ 0 for every Q in C.  The
Fantope is the convex hull of the rank-k orthogonal projections (Overton and
Womersley), and by Ky Fan's maximum principle the largest ⟨A, Q⟩ over those is
the sum of the k largest eigenvalues of A, computed here with scipy.linalg.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import linalg

from veil.erasers._fantope import FantopePoint, ascend


def _check_projection(before: np.ndarray, step: np.ndarray, after: FantopePoint, rank: int) -> None:
    projected = after.dense()
    eigenvalues = linalg.eigvalsh(projected)
    assert eigenvalues.min() >= -1e-12
    assert eigenvalues.max() <= 1 + 1e-12
    assert np.trace(projected) == pytest.approx(rank, abs=1e-9)
    gap = before + step - projected
    best_vertex = linalg.eigvalsh(gap)[-rank:].sum()
    assert best_vertex - np.sum(gap * projected) <= 1e-9


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("rank", [1, 3])
@pytest.mark.parametrize("length", [0.05, 0.7, 3.0])
def test_ascend_is_the_euclidean_projection_onto_the_fantope(seed: int, rank: int, length: float) -> None:
    rng = np.random.default_rng(seed)
    d, classes = 9, 2
    point = FantopePoint.vertex(np.linalg.qr(rng.normal(size=(d, rank)))[0])
    # A few steps first, so that points strictly inside the Fantope (weights
    # below 1, a floor above 0) are covered too.
    for _ in range(4):
        before = point.dense()
        left, right = rng.normal(size=(d, classes)), rng.normal(size=(d, classes))
        point = ascend(point, left, right, length, rank)
        step = (left @ right.T + right @ left.T) / 2
        _check_projection(before, length * step / np.linalg.norm(step), point, rank)


def test_a_zero_step_leaves_the_point_where_it_is() -> None:
    point = FantopePoint.vertex(np.eye(5)[:, :2])
    assert ascend(point, np.zeros((5, 1)), np.ones((5, 1)), 0.1, 2) is point
