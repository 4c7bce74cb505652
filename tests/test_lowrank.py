"""The factored map equals its dense form, keeps dtypes, and supports counterfactuals."""

from __future__ import annotations

import numpy as np
import pytest

from veil import LEACE, AffineLowRankMap, MeanProjection

from .conftest import planted
from .tolerances import apply_bound, assert_within


def test_factored_apply_equals_the_dense_affine_map() -> None:
    rng = np.random.default_rng(0)
    mapping = AffineLowRankMap(mean=rng.normal(size=20), u=rng.normal(size=(20, 3)), v=rng.normal(size=(20, 3)))
    x = rng.normal(size=(50, 20))
    a, b = mapping.to_dense()
    # x' = x - U Vᵀ (x - μ), written out with numpy for each row.
    expected = np.stack([row - mapping.u @ (mapping.v.T @ (row - mapping.mean)) for row in x])
    np.testing.assert_allclose(mapping.apply(x), expected, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(x @ a.T + b, expected, rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_transform_keeps_the_input_float_dtype(dtype: type[np.floating]) -> None:
    x, z = planted(n=400, d=8)
    eraser = LEACE().fit(x, z)
    out = eraser.transform(x.astype(dtype))
    assert out.dtype == dtype
    # Each dtype within its round-off bound of the exact map, the float64 reference within its own (tolerances.py).
    tolerance = apply_bound(eraser.map_, x, dtype).error + apply_bound(eraser.map_, x, np.float64).error
    assert_within(out, eraser.transform(x), tolerance, str(np.dtype(dtype)))


def test_integer_input_is_erased_in_float64() -> None:
    x, z = planted(n=400, d=8)
    eraser = LEACE().fit(np.round(x * 10).astype(np.int64), z)
    assert eraser.transform(np.round(x * 10).astype(np.int64)).dtype == np.float64


def test_map_refuses_inconsistent_shapes_and_non_finite_values() -> None:
    with pytest.raises(ValueError, match="inconsistent map shapes"):
        AffineLowRankMap(mean=np.zeros(4), u=np.zeros((4, 2)), v=np.zeros((4, 1)))
    with pytest.raises(ValueError, match="NaN or infinity"):
        AffineLowRankMap(mean=np.full(4, np.nan), u=np.zeros((4, 1)), v=np.zeros((4, 1)))
    mapping = AffineLowRankMap(mean=np.zeros(4), u=np.zeros((4, 1)), v=np.zeros((4, 1)))
    with pytest.raises(ValueError, match=r"shape \(n, 4\)"):
        mapping.apply(np.zeros((2, 5)))


def test_counterfactual_moves_every_row_to_the_target_class_mean() -> None:
    x, z = planted(n=3000, d=6, seed=1)
    eraser = LEACE().fit(x, z)
    for target in (0, 1):
        moved = eraser.counterfactual(x, target)
        # Every row now carries the target class's attribute component, so the
        # whole set's mean is that class's mean.
        np.testing.assert_allclose(moved.mean(0), x[z == target].mean(0), atol=1e-9)
    with pytest.raises(ValueError, match="unknown target class"):
        eraser.counterfactual(x, 7)


def test_counterfactual_of_a_numeric_attribute_follows_its_regression() -> None:
    rng = np.random.default_rng(2)
    age = rng.uniform(20, 70, size=2000)
    x = rng.normal(size=(2000, 5)) + np.outer(age, [0.05, 0.0, -0.02, 0.0, 0.0])
    eraser = MeanProjection().fit(x, age[:, None])
    moved = eraser.counterfactual(x, [40.0])
    slope = np.linalg.lstsq(np.column_stack([np.ones(2000), age]), x, rcond=None)[0]
    np.testing.assert_allclose(moved.mean(0), slope[0] + 40.0 * slope[1], atol=1e-9)


def test_normalize_returns_unit_rows_and_is_what_the_artifact_serves() -> None:
    x, z = planted(n=500, d=8)
    eraser = LEACE(normalize=True).fit(x, z)
    out = eraser.transform(x)
    np.testing.assert_allclose(np.linalg.norm(out, axis=1), 1.0, rtol=1e-12)
    np.testing.assert_allclose(eraser.export().apply(x), out, rtol=1e-12)


def test_a_map_leaving_coordinates_untouched_passes_them_through_and_is_the_map_with_those_rows_zeroed() -> None:
    rng = np.random.default_rng(5)
    d, k = 9, 3
    mapping = AffineLowRankMap(mean=rng.normal(size=d), u=rng.normal(size=(d, k)), v=rng.normal(size=(d, k)))
    kept = mapping.leaving_untouched(np.array([2, 7]))
    x = rng.normal(size=(50, d))
    out = kept.apply(x)
    np.testing.assert_array_equal(out[:, [2, 7]], x[:, [2, 7]])
    # Reference: the dense map x' = x - (x - μ) V Uᵀ built with numpy from the zeroed factors.
    u, v = mapping.u.copy(), mapping.v.copy()
    u[[2, 7]] = 0.0
    v[[2, 7]] = 0.0
    np.testing.assert_allclose(out, x - (x - mapping.mean) @ v @ u.T, rtol=1e-12, atol=1e-12)
    assert mapping.leaving_untouched(np.array([], dtype=np.intp)) is mapping
