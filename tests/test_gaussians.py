"""Optimal transport between Gaussians (veil.maps.gaussians) against scipy.linalg and closed forms."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg
from numpy.typing import NDArray

from veil.maps.gaussians import barycenter_covariance, monge_matrix, psd_power, require_positive_definite, wasserstein2


def _spd(rng: np.random.Generator, r: int) -> NDArray[np.float64]:
    a = rng.normal(size=(r, r))
    return np.asarray(a @ a.T + 0.5 * np.eye(r))


def _sqrtm(a: NDArray[np.float64]) -> NDArray[np.float64]:
    return np.real(np.asarray(scipy.linalg.sqrtm(a)))


@pytest.mark.parametrize(("r", "seed"), [(1, 0), (3, 1), (5, 2)])
def test_monge_matrix_matches_scipy_sqrtm(r: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    source, target = _spd(rng, r), _spd(rng, r)
    # Reference: the closed-form Monge map between Gaussians, A = S₀^{-1/2} (S₀^{1/2} S₁ S₀^{1/2})^{1/2} S₀^{-1/2},
    # with every matrix square root and inverse from scipy.linalg.
    root = _sqrtm(source)
    inverse_root = scipy.linalg.inv(root)
    expected = inverse_root @ _sqrtm(root @ target @ root) @ inverse_root
    a = monge_matrix(source, target)
    np.testing.assert_allclose(a, expected, rtol=1e-8, atol=1e-10)
    # The defining property: A pushes N(0, S₀) onto N(0, S₁), i.e. A S₀ A = S₁, and A is symmetric positive definite.
    np.testing.assert_allclose(a @ source @ a, target, rtol=1e-8, atol=1e-10)
    np.testing.assert_allclose(a, a.T, atol=1e-12)
    assert np.linalg.eigvalsh(a).min() > 0


@pytest.mark.parametrize(("r", "seed"), [(2, 3), (4, 4)])
def test_transport_cost_of_the_monge_map_is_the_w2_distance(r: int, seed: int) -> None:
    rng = np.random.default_rng(seed)
    m0, m1 = rng.normal(size=r), rng.normal(size=r)
    s0, s1 = _spd(rng, r), _spd(rng, r)
    a = monge_matrix(s0, s1)
    # E‖T(x) - x‖² for x ~ N(m0, S0) and T(x) = m1 + A (x - m0): ‖m1 - m0‖² + tr((A - I) S0 (A - I)).
    moved = float(np.sum((m1 - m0) ** 2) + np.trace((a - np.eye(r)) @ s0 @ (a - np.eye(r))))
    # Reference: the closed-form W2 between Gaussians, tr(S0 + S1 - 2 (S0^{1/2} S1 S0^{1/2})^{1/2}), with scipy's sqrtm.
    root = _sqrtm(s0)
    closed = float(np.sum((m0 - m1) ** 2) + np.trace(s0 + s1 - 2 * _sqrtm(root @ s1 @ root)))
    assert wasserstein2(m0, s0, m1, s1) ** 2 == pytest.approx(closed, rel=1e-9)
    assert moved == pytest.approx(closed, rel=1e-9)


def test_w2_distance_in_one_dimension_and_for_commuting_covariances() -> None:
    # Reference (a published closed form): in one dimension W2² = (m0 - m1)² + (σ0 - σ1)².
    assert wasserstein2(np.array([1.0]), np.array([[4.0]]), np.array([-2.0]), np.array([[9.0]])) == pytest.approx(
        np.sqrt(9.0 + 1.0)
    )
    # For commuting (here diagonal) covariances: W2² = ‖m0 - m1‖² + ‖S0^{1/2} - S1^{1/2}‖²_F.
    s0, s1 = np.diag([1.0, 4.0, 0.25]), np.diag([9.0, 1.0, 1.0])
    expected = np.sqrt(1.0 + np.sum((np.sqrt(np.diag(s0)) - np.sqrt(np.diag(s1))) ** 2))
    assert wasserstein2(np.zeros(3), s0, np.array([1.0, 0.0, 0.0]), s1) == pytest.approx(expected)


def test_barycenter_satisfies_its_fixed_point_equation() -> None:
    rng = np.random.default_rng(5)
    covariances = [_spd(rng, 4) for _ in range(3)]
    weights = np.array([0.2, 0.5, 0.3])
    result = barycenter_covariance(covariances, weights)
    assert result.converged
    s = result.covariance
    # The defining equation of the W2 barycenter of centred Gaussians, S = Σ w_c (S^{1/2} Σ_c S^{1/2})^{1/2},
    # evaluated with scipy's sqrtm.
    root = _sqrtm(s)
    rhs = sum(w * _sqrtm(root @ c @ root) for w, c in zip(weights, covariances, strict=True))
    np.testing.assert_allclose(s, rhs, rtol=1e-8, atol=1e-10)


def test_barycenter_of_two_gaussians_is_the_displacement_interpolant() -> None:
    rng = np.random.default_rng(6)
    s0, s1 = _spd(rng, 3), _spd(rng, 3)
    t = 0.3
    # Reference (a published result, McCann's displacement interpolation): the barycenter of two Gaussians with
    # weights (1 - t, t) is the push-forward of the first by (1 - t) I + t A, A the Monge matrix from S0 to S1.
    a = monge_matrix(s0, s1)
    step = (1 - t) * np.eye(3) + t * a
    expected = step @ s0 @ step
    result = barycenter_covariance([s0, s1], np.array([1 - t, t]))
    np.testing.assert_allclose(result.covariance, expected, rtol=1e-8, atol=1e-10)


def test_barycenter_warns_when_it_runs_out_of_iterations() -> None:
    from sklearn.exceptions import ConvergenceWarning

    rng = np.random.default_rng(7)
    covariances = [_spd(rng, 3) for _ in range(2)]
    with pytest.warns(ConvergenceWarning, match="did not reach"):
        result = barycenter_covariance(covariances, np.array([0.5, 0.5]), max_iter=1, tol=1e-15)
    assert not result.converged


def test_psd_power_and_the_singular_covariance_refusal() -> None:
    rng = np.random.default_rng(8)
    s = _spd(rng, 4)
    np.testing.assert_allclose(psd_power(s, 0.5), _sqrtm(s), rtol=1e-9)  # scipy.linalg.sqrtm as reference
    singular = np.outer([1.0, 2.0, 3.0], [1.0, 2.0, 3.0])
    with pytest.raises(ValueError, match="singular"):
        require_positive_definite(singular, "the covariance of class 'a'", rtol=1e-10)
    require_positive_definite(s, "a covariance", rtol=1e-10)
