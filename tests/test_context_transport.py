"""Class transport within each value of a context: the per-value maps, the inferred context, storage, the job."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import scipy.linalg
from numpy.typing import NDArray

from veil.erasers.transport import GaussianTransport
from veil.errors import DataError
from veil.fitting.job import fit_version
from veil.fitting.request import MethodSpec
from veil.maps.context_transport import ContextTransportMap
from veil.registry import Registry
from veil.registry.artifact_files import decode_artifact, encode_artifact
from veil.samples.sources import load_labelled_sample
from veil.samples.splitting import holdout_mask

from .test_context import planted as planted_fields
from .test_given_fit import _request
from .tolerances import apply_bound, assert_within

Array = NDArray[np.float64]
VALUES = np.array(["docks", "ferries", "nets"])
GAP = 12.0


def planted(n: int = 3000, d: int = 5, seed: int = 0) -> tuple[Array, NDArray[np.str_], NDArray[np.str_]]:
    """Three context values 12 apart along coordinate 0 (unit spread there); within each, two classes that differ
    in mean and covariance along the other coordinates, differently in every value and in unequal shares."""
    rng = np.random.default_rng(seed)
    g = rng.integers(0, VALUES.size, n)
    z = (rng.random(n) < np.array([0.3, 0.5, 0.7])[g]).astype(np.intp)
    scales = rng.uniform(0.4, 2.5, size=(VALUES.size, 2, d))
    scales[:, :, 0] = 1.0
    shifts = rng.normal(scale=2.0, size=(VALUES.size, d))
    shifts[:, 0] = 0.0
    x = rng.normal(size=(n, d)) * scales[g, z] + shifts[g] * z[:, None]
    x[:, 0] += GAP * g
    return x, np.array(["he", "she"])[z], VALUES[g]


def _psd_sqrt(matrix: Array) -> Array:
    return np.real(scipy.linalg.sqrtm(matrix))


def _reference_maps(x: Array, codes: NDArray[np.intp]) -> list[tuple[Array, Array]]:
    """Each class's Monge map onto the barycenter, ``T_c(x) = μ + A_c (x - μ_c)``, as (A_c, offset) with scipy.linalg.

    The barycenter's covariance is the fixed point ``S = S^{-1/2} (Σ_c w_c (S^{1/2} Σ_c S^{1/2})^{1/2})² S^{-1/2}``
    (the published fixed-point iteration for Gaussian 2-Wasserstein barycenters), and the Monge map between
    Gaussians ``A_c = Σ_c^{-1/2} (Σ_c^{1/2} S Σ_c^{1/2})^{1/2} Σ_c^{-1/2}`` (the published closed form).
    """
    classes = np.unique(codes)
    weights = np.array([np.mean(codes == c) for c in classes])
    covariances = [np.cov(x[codes == c], rowvar=False) for c in classes]
    barycenter = sum(w * s for w, s in zip(weights, covariances, strict=True))
    for _ in range(1000):
        root = _psd_sqrt(barycenter)
        inverse_root = scipy.linalg.inv(root)
        inner = sum(w * _psd_sqrt(root @ s @ root) for w, s in zip(weights, covariances, strict=True))
        barycenter = inverse_root @ inner @ inner @ inverse_root
    mean = x.mean(axis=0)
    maps = []
    for c, covariance in zip(classes, covariances, strict=True):
        root = _psd_sqrt(covariance)
        inverse_root = scipy.linalg.inv(root)
        a = inverse_root @ _psd_sqrt(root @ barycenter @ root) @ inverse_root
        maps.append((a, mean - a @ x[codes == c].mean(axis=0)))
    return maps


def test_each_value_map_is_the_class_transport_of_that_values_rows() -> None:
    x, z, given = planted()
    model = GaussianTransport(shrinkage=0.0, tol=1e-14, max_iter=1000).fit(x, z, given=given)
    mapping = model.map_
    assert isinstance(mapping, ContextTransportMap)
    assert mapping.values.tolist() == VALUES.tolist()
    codes = np.searchsorted(model.classes_, z).astype(np.intp)
    for g, value in enumerate(VALUES):
        rows = given == value
        moved = mapping.value_maps[g].transport(x[rows], codes[rows])
        expected = np.empty_like(moved)
        for c, (a, offset) in enumerate(_reference_maps(x[rows], codes[rows])):
            expected[codes[rows] == c] = x[rows][codes[rows] == c] @ a.T + offset
        # Both sides stop their fixed points at round-off level; a few hundred float64 ulps of the values' size
        # cover the square roots and inverses of well-conditioned 5×5 matrices.
        assert_within(moved, expected, 1e3 * np.finfo(np.float64).eps * np.abs(x).max(), str(value))
        # With the true context given, each value's rows are moved as a transport fitted on them alone moves them.
        direct = GaussianTransport(shrinkage=0.0, tol=1e-14, max_iter=1000).fit(x[rows], z[rows])
        values = np.full(int(rows.sum()), g, dtype=np.intp)
        np.testing.assert_array_equal(mapping.apply_within(x[rows], values), direct.transform(x[rows]))
    # And the reference can fail: the classes differ within each value before the transport.
    assert np.abs(np.cov(x[(given == "nets") & (z == "he")], rowvar=False)[1:, 1:] - np.eye(4)).max() > 0.5


def test_the_inferred_context_is_the_true_one_where_it_is_clearly_readable() -> None:
    x, z, given = planted(seed=1)
    mapping = GaussianTransport(random_state=0).fit(x, z, given=given).map_
    assert isinstance(mapping, ContextTransportMap)
    true = np.searchsorted(VALUES, given).astype(np.intp)
    # Clearly readable: within a quarter of the gap of its own value's centre along the coordinate that carries
    # the context (4 standard deviations of the rows there from the midpoint between two values).
    clear = np.abs(x[:, 0] - GAP * true) < GAP / 4
    assert clear.mean() > 0.99
    np.testing.assert_array_equal(mapping.inferred_values(x[clear]), true[clear])
    np.testing.assert_array_equal(mapping.apply(x[clear]), mapping.apply_within(x[clear], true[clear]))
    # Rows moved between the values are inferred to be where they now lie: the inference reads the embedding.
    moved = x[clear].copy()
    moved[:, 0] += GAP
    shifted = mapping.inferred_values(moved)
    np.testing.assert_array_equal(shifted[true[clear] < 2], true[clear][true[clear] < 2] + 1)


@pytest.mark.parametrize("then_leace", [False, True])
def test_the_map_round_trips_through_the_artifact_files(then_leace: bool) -> None:
    x, z, given = planted(seed=2)
    model = GaussianTransport(then_leace=then_leace, rank=3, random_state=0).fit(x, z, given=given)
    artifact = model.export()
    loaded = decode_artifact(encode_artifact(artifact))
    assert loaded.kind == artifact.kind == "context-transport"
    assert isinstance(loaded.map, ContextTransportMap)
    stored, fitted = loaded.map.arrays(), model.map_.arrays()
    assert stored.keys() == fitted.keys()
    for name, array in fitted.items():
        np.testing.assert_array_equal(stored[name], array, err_msg=name)
    np.testing.assert_array_equal(loaded.apply(x), model.transform(x))
    assert loaded.moments.given is not None
    assert loaded.moments.given.moments[0].values.tolist() == VALUES.tolist()
    # LEACE after guards each of the 3 values (one direction each for two classes) and the population (one more).
    assert loaded.map.describe() == {
        "dim": 5, "context_values": 3, "class_maps": 6, "rank": 3, "rank_after": 4 if then_leace else 0,
    }  # fmt: skip


@pytest.mark.parametrize("inference", ["hard", "soft"])
def test_float32_stays_float32_and_matches_float64(inference: str) -> None:
    x, z, given = planted(seed=3)
    model = GaussianTransport(inference=inference, then_leace=True, random_state=0).fit(x, z, given=given)
    x32 = x.astype(np.float32)
    out32 = model.transform(x32)
    assert out32.dtype == np.float32
    assert model.counterfactual(x32, "she").dtype == np.float32
    # float32 within its round-off bound of the exact map, float64 within its own (tests/tolerances.py, which
    # refuses rows whose inferred context or class round-off could flip).
    tolerance = apply_bound(model.map_, x32).error + apply_bound(model.map_, x32, np.float64).error
    assert_within(out32, model.transform(x32.astype(np.float64)), tolerance, inference)


def test_a_value_with_too_few_rows_of_a_class_uses_the_population_map() -> None:
    x, z, given = planted(seed=4)
    z = np.where(given == "ferries", "he", z)
    z[np.flatnonzero(given == "ferries")[0]] = "she"
    with pytest.warns(UserWarning, match=r"context value\(s\) 'ferries' have fewer than 2 fitting rows"):
        model = GaussianTransport(random_state=0).fit(x, z, given=given)
    assert model.fallback_values_.tolist() == ["ferries"]
    mapping = model.map_
    assert isinstance(mapping, ContextTransportMap)
    population = GaussianTransport(random_state=0).fit(x, z).map_
    for name, array in population.arrays().items():
        np.testing.assert_array_equal(mapping.value_maps[1].arrays()[name], array, err_msg=name)
    with pytest.raises(ValueError, match="single value"):
        GaussianTransport().fit(x, z, given=np.full(z.size, "docks"))


def test_veil_fit_stores_the_transport_fitted_within_the_field(tmp_path: Path) -> None:
    x, z, field = planted_fields(n=3000, seed=8)
    np.savez(tmp_path / "s.npz", embedding=x, z=z, field=field)
    sample = load_labelled_sample(tmp_path / "s.npz", attribute="z", given="field")
    request = _request("ctx", method="transport")
    outcome = fit_version(sample, request, registry=Registry(tmp_path / "r"))
    stored = Registry(tmp_path / "r").read_version("ctx", outcome.version_id)
    fit = ~holdout_mask(x.shape[0], fraction=0.2, seed=0)
    expected = GaussianTransport(random_state=0).fit(x[fit], z[fit], given=field[fit])
    np.testing.assert_array_equal(stored.artifact.apply(x), expected.transform(x))
    assert stored.card["map_kind"] == "context-transport"
    assert stored.card["given"]["guard_population"] is False
    # The small-class rules within each value (veil.defaults: MIN_CLASS_ROWS = 5) hold for transport's fitting rows.
    welding = np.flatnonzero(fit & (field == "welding"))
    relabelled = np.where(field == "welding", "he", z)
    relabelled[welding[:3]] = "she"
    np.savez(tmp_path / "few.npz", embedding=x, z=relabelled, field=field)
    few = load_labelled_sample(tmp_path / "few.npz", attribute="z", given="field")
    with pytest.raises(DataError, match=r"'welding' \(class 'she' of 'z': 3 row\(s\)\)") as refused:
        fit_version(few, _request("few", method="transport"), registry=Registry(tmp_path / "r"))
    # Transport cannot pool small values, so the refusal does not suggest it.
    assert "pool" not in str(refused.value)
    with pytest.raises(DataError, match="--within-only applies to leace and meanproj"):
        MethodSpec("transport", given="field", guard_population=False)
    with pytest.raises(DataError, match="inlp cannot guard within a context"):
        MethodSpec("inlp", given="field")
