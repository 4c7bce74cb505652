"""Parts class transport fits with, over the population or within one context value: support, classifier, result."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from sklearn.linear_model import LogisticRegression

from veil.erasers.scaling import FlooredScaler
from veil.maps.gaussians import Barycenter
from veil.maps.linalg import dead_coordinates, whitening_factors
from veil.maps.transport import ClassTransportMap

Float64Array = NDArray[np.float64]


@dataclass(frozen=True, eq=False)
class ClassFit:
    """One class-transport fit: the map and what it was made from.

    Attributes
    ----------
    map : ClassTransportMap
    covariances : ndarray of shape (C, r, r)
        The (shrunk) class covariances in the support basis.
    shrinkage : ndarray of shape (C,)
        The shrinkage coefficient of each class.
    barycenter : Barycenter
    support : ndarray of shape (d, r)
    """

    map: ClassTransportMap
    covariances: Float64Array
    shrinkage: Float64Array
    barycenter: Barycenter
    support: Float64Array


def transport_support(x: Float64Array) -> Float64Array:
    """Orthonormal basis (d, r) of the rows' support: LEACE's whitening cut, dead coordinates left out exactly.

    No spread, no transport (and no rank decided by round-off).  An embedding model's dead coordinates are left
    out of it exactly, so no class map writes into them (a rounding-level copy of the attribute there is what
    boosted trees read; see :class:`~veil.erasers._base.LinearErasure`).
    """
    centred = x - x.mean(axis=0)
    covariance = centred.T @ centred / (x.shape[0] - 1)
    live = np.setdiff1d(np.arange(x.shape[1]), dead_coordinates(covariance))
    support = np.zeros((x.shape[1], 0))
    if live.size:
        live_support, _ = whitening_factors(covariance[np.ix_(live, live)])
        support = np.zeros((x.shape[1], live_support.shape[1]))
        support[live] = live_support
    if support.shape[1] == 0:
        raise ValueError("the rows of X do not vary: there is nothing to transport")
    return support


def linear_classifier(
    x: Float64Array, codes: NDArray[np.intp], *, c: float, random_state: int | None
) -> tuple[Float64Array, Float64Array]:
    """Logistic regression of ``codes`` on standardised ``x``, as logits ``x Wᵀ + b`` of the raw rows (C, d), (C,)."""
    scaler = FlooredScaler().fit(x)
    model = LogisticRegression(C=c, max_iter=3000, random_state=random_state)
    model.fit(scaler.transform(x), codes)
    # Fold the standardisation into the coefficients, so applying is one product with the raw rows.
    coef = np.asarray(model.coef_, dtype=np.float64) / scaler.scale_
    intercept = np.asarray(model.intercept_, dtype=np.float64) - coef @ scaler.mean_
    if coef.shape[0] == 1:
        # Binary: logits (0, w·x + b) give the same probabilities as the sigmoid.
        coef = np.vstack([np.zeros_like(coef), coef])
        intercept = np.concatenate([[0.0], intercept])
    return coef, intercept
