"""The one form every veil eraser takes: an affine low-rank map.

``x' = x - U Vᵀ (x - μ)``, with ``U`` and ``V`` of shape (d, k) and k a handful
of directions.  For row-major batches this is ``X' = X - (X - μ) V Uᵀ``; it is
applied as ``X - (X V - μ V) Uᵀ`` so a batch costs O(n·d·k), needs no centred
copy of ``X``, and never touches a d×d matrix.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np
from numpy.typing import NDArray

Float64Array = NDArray[np.float64]
FloatArray = NDArray[np.floating]


def _frozen(array: NDArray[np.floating]) -> Float64Array:
    out = np.array(array, dtype=np.float64, order="C", copy=True)
    out.setflags(write=False)
    return out


@dataclass(frozen=True, eq=False)
class AffineLowRankMap:
    """``x' = x - U Vᵀ (x - μ)``: centre, remove the span of ``U`` along ``V``, re-centre.

    Parameters
    ----------
    mean : ndarray of shape (d,)
        ``μ``, the centring point.
    u : ndarray of shape (d, k)
        ``U``: the directions removed from the embedding.
    v : ndarray of shape (d, k)
        ``V``: the read-out of the component to remove.  ``V = U`` for an
        orthogonal projection (INLP, R-LACE, mean projection).
    """

    kind: ClassVar[str] = "affine-lowrank"
    affine: ClassVar[bool] = True

    mean: Float64Array
    u: Float64Array
    v: Float64Array
    _cast: dict[np.dtype[np.floating], tuple[FloatArray, FloatArray, FloatArray]] = field(
        default_factory=dict, init=False, repr=False
    )

    def __post_init__(self) -> None:
        mean, u, v = _frozen(self.mean), _frozen(self.u), _frozen(self.v)
        if mean.ndim != 1 or u.ndim != 2 or u.shape != v.shape or u.shape[0] != mean.shape[0]:
            raise ValueError(f"inconsistent map shapes: mean {mean.shape}, U {u.shape}, V {v.shape}")
        if not (np.all(np.isfinite(mean)) and np.all(np.isfinite(u)) and np.all(np.isfinite(v))):
            raise ValueError("the map's mean or factors contain NaN or infinity")
        object.__setattr__(self, "mean", mean)
        object.__setattr__(self, "u", u)
        object.__setattr__(self, "v", v)

    @property
    def dim(self) -> int:
        """Embedding dimension d."""
        return int(self.mean.shape[0])

    @property
    def rank(self) -> int:
        """Number of directions k removed."""
        return int(self.u.shape[1])

    def _factors(self, dtype: np.dtype[np.floating]) -> tuple[FloatArray, FloatArray, FloatArray]:
        # Cast once per dtype so float32 batches stay float32 end to end.
        cached = self._cast.get(dtype)
        if cached is None:
            v, u = self.v, self.u
            if v.shape[1] == 1:
                # A product with an inner dimension of 1 (an outer product) leaves numpy's BLAS path and runs
                # about 6x slower at d = 768; a zero second direction keeps it on gemm and changes nothing.
                v, u = np.column_stack([v, np.zeros_like(v)]), np.column_stack([u, np.zeros_like(u)])
            cached = (v.astype(dtype), (self.mean @ v).astype(dtype), np.ascontiguousarray(u.T.astype(dtype)))
            self._cast[dtype] = cached
        return cached

    def component(self, x: FloatArray) -> FloatArray:
        """The part removed from each row, ``(x - μ) V Uᵀ``, shape (n, d), in ``x``'s dtype."""
        v, mean_v, u_t = self._factors(x.dtype)
        coefficients = x @ v
        coefficients -= mean_v
        return coefficients @ u_t

    def apply(self, x: FloatArray) -> FloatArray:
        """Erase a batch ``x`` of shape (n, d); returns a new array of the same dtype."""
        if x.ndim != 2 or x.shape[1] != self.dim:
            raise ValueError(f"expected a batch of shape (n, {self.dim}), got {x.shape}")
        out = self.component(x)
        np.subtract(x, out, out=out)
        return out

    def adjoint(self, y: FloatArray) -> FloatArray:
        """``Aᵀ y = y - V Uᵀ y`` for each row of ``y`` (n, d), ``A = I - U Vᵀ``: O(n·d·k), in ``y``'s dtype."""
        if y.ndim != 2 or y.shape[1] != self.dim:
            raise ValueError(f"expected a batch of shape (n, {self.dim}), got {y.shape}")
        v, _, u_t = self._factors(y.dtype)
        out: FloatArray = (y @ u_t.T) @ v.T
        np.subtract(y, out, out=out)
        return out

    def search_vector(self, cleaned: FloatArray) -> FloatArray:
        """:meth:`adjoint`: ``Aᵀ r(q)`` ranks raw rows ``x`` as ``r(q)`` ranks cleaned rows ``r(x)`` (inner product)."""
        return self.adjoint(cleaned)

    def shift_towards(self, target_mean: Float64Array) -> Float64Array:
        """``U Vᵀ (m - μ)``: the component a row at mean ``m`` carries, shape (d,)."""
        return np.asarray(((np.asarray(target_mean, dtype=np.float64) - self.mean) @ self.v) @ self.u.T)

    def leaving_untouched(self, coordinates: NDArray[np.integer]) -> AffineLowRankMap:
        """The same map with the rows of ``U`` and ``V`` at ``coordinates`` set to zero.

        Those coordinates then neither feed the removed component nor receive
        any of it: the map passes them through exactly.
        """
        if len(coordinates) == 0:
            return self
        u, v = self.u.copy(), self.v.copy()
        u[coordinates] = 0.0
        v[coordinates] = 0.0
        return AffineLowRankMap(mean=self.mean, u=u, v=v)

    def removed_variance_share(self, covariance: Float64Array) -> float:
        """``E‖U Vᵀ (x − μ)‖² / E‖x − μ‖² = tr(Uᵀ U Vᵀ Σ V) / tr Σ`` for data of covariance ``Σ`` (d, d)."""
        total = float(np.trace(covariance))
        removed = float(np.trace((self.u.T @ self.u) @ (self.v.T @ covariance @ self.v)))
        return removed / total if total > 0 else 0.0

    def arrays(self) -> dict[str, Float64Array]:
        """The map's arrays by name, as an artifact file stores them."""
        return {"mean": self.mean, "u": self.u, "v": self.v}

    @classmethod
    def from_arrays(cls, arrays: Mapping[str, NDArray[Any]]) -> AffineLowRankMap:
        """The map :meth:`arrays` describes (raises ``KeyError`` or ``ValueError`` on missing or bad arrays)."""
        return cls(mean=arrays["mean"], u=arrays["u"], v=arrays["v"])

    def describe(self) -> dict[str, int]:
        """Its shape for people and cards: dimension and rank."""
        return {"dim": self.dim, "rank": self.rank}

    def counterfactual(self, x: FloatArray, class_means: Float64Array, target: int) -> FloatArray:
        """Erase, then add the component a row at class ``target``'s mean carries: ``x' + U Vᵀ (μ_t - μ)``."""
        out = self.apply(x)
        out += self.shift_towards(class_means[target]).astype(out.dtype)
        return out

    def to_dense(self) -> tuple[Float64Array, Float64Array]:
        """The same map as ``x' = A x + b`` with a dense ``A`` (d, d).

        For tests and baselines only: the serving path never builds ``A``.
        """
        a = np.eye(self.dim) - self.u @ self.v.T
        return a, self.u @ (self.v.T @ self.mean)
