"""Points of the Fantope ``{0 ⪯ P ⪯ I, tr P = k}`` kept in factored form, and the projection step onto it.

R-LACE moves its relaxed projection by a step of low rank at a time.  A
point is kept as ``P = E diag(w) Eᵀ + s (I - E Eᵀ)`` with ``E`` a few
orthonormal columns, so neither the step nor the projection back onto the
Fantope needs a d×d matrix.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from veil.maps.linalg import orthonormal_basis

Float64Array = NDArray[np.float64]

# The shift that restores the trace is found by bisection on an interval a
# few units wide: 60 halvings narrow it below float64 resolution.
_BISECTION_STEPS = 60


@dataclass(frozen=True)
class FantopePoint:
    """``P = E diag(w) Eᵀ + s (I - E Eᵀ)``: weights ``w`` on ``E``, the floor ``s`` on its complement.

    Attributes
    ----------
    basis : ndarray of shape (d, m)
        Orthonormal columns ``E``.
    weights : ndarray of shape (m,)
        Eigenvalues of ``P`` along ``E``, in [0, 1].
    floor : float
        The eigenvalue of ``P`` on the orthogonal complement of ``E``.
    """

    basis: Float64Array
    weights: Float64Array
    floor: float

    @classmethod
    def vertex(cls, basis: Float64Array) -> FantopePoint:
        """The orthogonal projection onto the span of the orthonormal columns ``basis`` (shape (d, k))."""
        return cls(basis=basis, weights=np.ones(basis.shape[1]), floor=0.0)

    def kept(self, a: Float64Array) -> Float64Array:
        """``(I - P) a`` for ``a`` of shape (d, c)."""
        along = (self.weights - self.floor)[:, None] * (self.basis.T @ a)
        return np.asarray((1.0 - self.floor) * a - self.basis @ along)

    def dense(self) -> Float64Array:
        """``P`` as a d×d matrix (a fit-time diagnostic; the game never builds it)."""
        d = self.basis.shape[0]
        return np.asarray(
            (self.basis * (self.weights - self.floor)) @ self.basis.T + self.floor * np.eye(d), dtype=np.float64
        )

    def top(self, rank: int) -> Float64Array:
        """The ``rank`` columns of ``E`` with the largest weights, shape (d, rank).

        Columns keep their order among equal weights, so no tie is settled
        by round-off.
        """
        order = np.argsort(-self.weights, kind="stable")[:rank]
        return np.asarray(self.basis[:, order])


def _trace_shift(values: Float64Array, floor: float, complement: int, rank: int) -> float:
    """The ``γ`` with ``Σ clip(values - γ, 0, 1) + complement · clip(floor - γ, 0, 1) = rank``."""
    low = min(float(values.min(initial=floor)), floor) - 1.0
    high = max(float(values.max(initial=floor)), floor)
    for _ in range(_BISECTION_STEPS):
        shift = (low + high) / 2
        trace = float(np.clip(values - shift, 0.0, 1.0).sum()) + complement * min(max(floor - shift, 0.0), 1.0)
        if trace > rank:
            low = shift
        else:
            high = shift
    return (low + high) / 2


def ascend(point: FantopePoint, left: Float64Array, right: Float64Array, length: float, rank: int) -> FantopePoint:
    """Project ``P + t S`` onto the Fantope of trace ``rank``, ``S = (left rightᵀ + right leftᵀ) / 2``.

    ``t`` makes the step's Frobenius norm ``length``; a zero ``S`` leaves
    ``P`` where it is.  The Euclidean projection of a symmetric matrix with
    eigen-decomposition ``V diag(λ) Vᵀ`` onto the Fantope is
    ``V diag(clip(λ - γ, 0, 1)) Vᵀ``, for the shift ``γ`` that makes the trace
    ``rank``.  ``P + t S`` differs from ``s I`` only on the span of ``E``,
    ``left`` and ``right``, so its eigen-decomposition is that of a small
    matrix on that span, plus the eigenvalue ``s`` on the complement.

    Parameters
    ----------
    point : FantopePoint
        ``P``, with ``d`` rows in its basis.
    left, right : ndarray of shape (d, c)
        Factors of the step direction.
    length : float
        Frobenius norm of the step.
    rank : int
        Trace of the Fantope.

    Returns
    -------
    FantopePoint
    """
    span = orthonormal_basis(np.hstack([point.basis, left, right]))
    on_basis = span.T @ point.basis
    left_in, right_in = span.T @ left, span.T @ right
    step = (left_in @ right_in.T + right_in @ left_in.T) / 2
    norm = float(np.linalg.norm(step))
    if norm == 0.0:
        return point
    # P + tS - sI restricted to the span; the span is orthonormal, so norms carry over.
    small = (on_basis * (point.weights - point.floor)) @ on_basis.T + (length / norm) * step
    eigenvalues, eigenvectors = np.linalg.eigh((small + small.T) / 2)
    values = point.floor + eigenvalues
    complement = span.shape[0] - span.shape[1]
    shift = _trace_shift(values, point.floor, complement, rank)
    weights = np.clip(values - shift, 0.0, 1.0)
    floor = min(max(point.floor - shift, 0.0), 1.0) if complement else 0.0
    # A direction whose weight equals the floor is already described by the
    # complement term: dropping it leaves P exactly the same.  The ``rank``
    # heaviest are kept whatever their weight, so the rounding always has
    # ``rank`` columns to choose from.
    distinct = weights != floor
    distinct[np.argsort(-weights, kind="stable")[:rank]] = True
    return FantopePoint(basis=span @ eigenvectors[:, distinct], weights=weights[distinct], floor=floor)
