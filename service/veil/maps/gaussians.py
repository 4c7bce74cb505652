"""Optimal transport between Gaussians: the Monge map, the 2-Wasserstein distance and the barycenter.

For ``N(m₀, Σ₀)`` and ``N(m₁, Σ₁)`` with ``Σ₀`` positive definite, the map
``T(x) = m₁ + A (x - m₀)`` with
``A = Σ₀^{-1/2} (Σ₀^{1/2} Σ₁ Σ₀^{1/2})^{1/2} Σ₀^{-1/2}`` pushes the first onto
the second at the least mean squared displacement; ``A`` is symmetric
positive definite and ``A Σ₀ A = Σ₁``.  The barycenter of several Gaussians
under that cost is the Gaussian whose covariance ``S`` solves
``S = Σ_c w_c (S^{1/2} Σ_c S^{1/2})^{1/2}``, found by a fixed-point iteration.

Every function works in float64 on symmetric matrices through ``eigh``, so
square roots stay symmetric and no complex round-off enters.
"""

from __future__ import annotations

import warnings
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from sklearn.exceptions import ConvergenceWarning

Float64Array = NDArray[np.float64]


def _symmetric(a: Float64Array) -> Float64Array:
    return np.asarray((a + a.T) / 2.0)


def psd_power(a: Float64Array, power: float) -> Float64Array:
    """``a^power`` for a symmetric positive semi-definite ``a`` of shape (r, r).

    Eigenvalues below zero (round-off of a semi-definite matrix) count as
    zero; a negative ``power`` needs a positive definite ``a`` (callers check).
    """
    eigenvalues, eigenvectors = np.linalg.eigh(_symmetric(np.asarray(a, dtype=np.float64)))
    scaled = eigenvectors * np.clip(eigenvalues, 0.0, None) ** power
    return _symmetric(scaled @ eigenvectors.T)


def require_positive_definite(covariance: Float64Array, what: str, *, rtol: float) -> None:
    """Refuse a covariance whose smallest eigenvalue is at or below ``rtol`` times its largest.

    Raises
    ------
    ValueError
        Naming ``what`` and the smallest relative eigenvalue.
    """
    eigenvalues = np.linalg.eigvalsh(_symmetric(covariance))
    top = float(eigenvalues[-1])
    if top <= 0.0 or float(eigenvalues[0]) <= rtol * top:
        ratio = float(eigenvalues[0]) / top if top > 0 else 0.0
        raise ValueError(
            f"{what} is singular (smallest eigenvalue {ratio:.1e} of the largest): "
            "too few rows for the dimension, or duplicated rows; use shrinkage"
        )


def monge_matrix(source: Float64Array, target: Float64Array) -> Float64Array:
    """The linear part ``A`` of the optimal map from ``N(·, source)`` to ``N(·, target)``.

    Parameters
    ----------
    source : ndarray of shape (r, r)
        Positive definite covariance.
    target : ndarray of shape (r, r)
        Positive semi-definite covariance.

    Returns
    -------
    A : ndarray of shape (r, r)
        Symmetric, with ``A @ source @ A == target``.
    """
    root = psd_power(source, 0.5)
    inverse_root = psd_power(source, -0.5)
    return _symmetric(inverse_root @ psd_power(root @ target @ root, 0.5) @ inverse_root)


def wasserstein2(
    mean_0: Float64Array, covariance_0: Float64Array, mean_1: Float64Array, covariance_1: Float64Array
) -> float:
    """2-Wasserstein distance between two Gaussians.

    ``W₂² = ‖m₀ - m₁‖² + tr(Σ₀ + Σ₁ - 2 (Σ₀^{1/2} Σ₁ Σ₀^{1/2})^{1/2})``.
    """
    root = psd_power(covariance_0, 0.5)
    cross = float(np.trace(psd_power(root @ covariance_1 @ root, 0.5)))
    squared = float(np.sum((mean_0 - mean_1) ** 2)) + float(np.trace(covariance_0) + np.trace(covariance_1)) - 2 * cross
    return float(np.sqrt(max(squared, 0.0)))


@dataclass(frozen=True)
class Barycenter:
    """The covariance of a Gaussian barycenter and how the iteration ended."""

    covariance: Float64Array
    n_iter: int
    converged: bool


def barycenter_covariance(
    covariances: Sequence[Float64Array], weights: Float64Array, *, max_iter: int = 200, tol: float = 1e-10
) -> Barycenter:
    """Covariance ``S`` of the 2-Wasserstein barycenter of centred Gaussians.

    Iterates ``S ← S^{-1/2} (Σ_c w_c (S^{1/2} Σ_c S^{1/2})^{1/2})² S^{-1/2}``
    from the weighted mean of the covariances, until the relative Frobenius
    change is at most ``tol``.  Started from a positive definite matrix and
    with positive definite ``Σ_c``, every iterate is positive definite and
    the iteration converges to the unique solution of
    ``S = Σ_c w_c (S^{1/2} Σ_c S^{1/2})^{1/2}``.

    Parameters
    ----------
    covariances : sequence of ndarray of shape (r, r)
        Positive definite covariances.
    weights : ndarray of shape (n_classes,)
        Non-negative weights summing to 1.
    max_iter : int, default=200
    tol : float, default=1e-10

    Returns
    -------
    Barycenter
        A :class:`~sklearn.exceptions.ConvergenceWarning` is issued when
        ``max_iter`` iterations did not reach ``tol``.
    """
    current = _symmetric(sum((w * c for w, c in zip(weights, covariances, strict=True)), np.zeros_like(covariances[0])))
    for iteration in range(1, max_iter + 1):
        root = psd_power(current, 0.5)
        inverse_root = psd_power(current, -0.5)
        middle = sum(
            (w * psd_power(root @ c @ root, 0.5) for w, c in zip(weights, covariances, strict=True)),
            np.zeros_like(current),
        )
        updated = _symmetric(inverse_root @ middle @ middle @ inverse_root)
        change = float(np.linalg.norm(updated - current)) / float(np.linalg.norm(current))
        current = updated
        if change <= tol:
            return Barycenter(covariance=current, n_iter=iteration, converged=True)
    warnings.warn(
        f"the barycenter iteration did not reach tol={tol} in {max_iter} iterations", ConvergenceWarning, stacklevel=2
    )
    return Barycenter(covariance=current, n_iter=max_iter, converged=False)
