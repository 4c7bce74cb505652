"""A class-conditional transport map: each class's Gaussian carried onto a common barycenter.

Not affine: the map first infers each row's class with a stored linear
classifier, then moves the row with that class's affine map

``T_c(x) = x + (μ - μ_c) + D_c G_c D_cᵀ (x - μ_c)``

where ``μ`` is the barycenter's mean (the fitting data's mean), ``μ_c`` the
class mean and ``D_c G_c D_cᵀ`` the factored ``A_c - I`` of the class's
Monge map (``D_c`` orthonormal, shape (d, k); ``G_c`` diagonal).  A row
costs O(d·k) per class it is moved by, and no d×d matrix is ever built.
With soft inference the moves of all classes are averaged by the
classifier's probabilities.  An optional affine low-rank map runs after.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np
from numpy.typing import NDArray

from veil.maps.lowrank import AffineLowRankMap

Float64Array = NDArray[np.float64]
FloatArray = NDArray[np.floating]

_FACTOR_NAMES = ("mean", "class_means", "directions", "gains", "classifier_coef", "classifier_intercept", "priors")


def _frozen(array: NDArray[Any], dtype: type[np.generic] = np.float64) -> NDArray[Any]:
    out = np.array(array, dtype=dtype, order="C", copy=True)
    out.setflags(write=False)
    return out


@dataclass(frozen=True)
class _Cast:
    """The map's factors in one dtype, for one apply path."""

    mean: FloatArray
    shifts: FloatArray  # (C, d): μ - μ_c - D_c G_c D_cᵀ (μ_c - μ), the move of a row at μ
    directions: FloatArray  # (C, d, k)
    directions_t: FloatArray  # (C, k, d), scaled by the gains
    mean_reads: FloatArray  # (C, k): μ D_c
    coef_t: FloatArray  # (d, C)
    intercept: FloatArray  # (C,)


@dataclass(frozen=True, eq=False)
class ClassTransportMap:
    """Infer each row's class, move it with that class's map onto the barycenter.

    Parameters
    ----------
    mean : ndarray of shape (d,)
        ``μ``: the barycenter's mean, which is the fitting data's mean.
    class_means : ndarray of shape (C, d)
        ``μ_c`` for each class.
    directions : ndarray of shape (C, d, k)
        ``D_c``: orthonormal eigenvectors of ``A_c - I`` (the ``k`` kept).
    gains : ndarray of shape (C, k)
        ``G_c``: their eigenvalues (each above -1, since ``A_c`` is positive definite).
    classifier_coef : ndarray of shape (C, d)
        Rows of the linear classifier's logits (``logits = x W ᵀ + b``).
    classifier_intercept : ndarray of shape (C,)
    priors : ndarray of shape (C,)
        Share of fitting rows in each class (the barycenter's weights).
    soft : bool
        Average the class moves by the classifier's probabilities instead of
        taking the most probable class.
    after : AffineLowRankMap or None
        An affine map applied after the transport (LEACE fitted on the
        transported fitting data), or ``None``.
    """

    kind: ClassVar[str] = "class-transport"
    affine: ClassVar[bool] = False

    mean: Float64Array
    class_means: Float64Array
    directions: Float64Array
    gains: Float64Array
    classifier_coef: Float64Array
    classifier_intercept: Float64Array
    priors: Float64Array
    soft: bool
    after: AffineLowRankMap | None = None
    _cast: dict[np.dtype[np.floating], _Cast] = field(default_factory=dict, init=False, repr=False)

    def __post_init__(self) -> None:
        for name in _FACTOR_NAMES:
            object.__setattr__(self, name, _frozen(getattr(self, name)))
        d = self.mean.shape[0] if self.mean.ndim == 1 else -1
        n_classes = self.class_means.shape[0] if self.class_means.ndim == 2 else -1
        expected = {
            "class_means": (n_classes, d),
            "directions": (n_classes, d, self.directions.shape[-1] if self.directions.ndim == 3 else -1),
            "gains": (n_classes, self.directions.shape[-1] if self.directions.ndim == 3 else -1),
            "classifier_coef": (n_classes, d),
            "classifier_intercept": (n_classes,),
            "priors": (n_classes,),
        }
        shapes = {name: getattr(self, name).shape for name in expected}
        if d < 1 or n_classes < 2 or any(shapes[name] != shape for name, shape in expected.items()):
            raise ValueError(f"inconsistent transport map shapes: mean {self.mean.shape}, {shapes}")
        if not all(np.all(np.isfinite(getattr(self, name))) for name in _FACTOR_NAMES):
            raise ValueError("the transport map's arrays contain NaN or infinity")
        if np.any(self.gains <= -1.0):
            raise ValueError("a transport gain is at or below -1: the class map would not be positive definite")
        if self.after is not None and self.after.dim != d:
            raise ValueError(f"the map after the transport has dimension {self.after.dim}, not {d}")
        object.__setattr__(self, "soft", bool(self.soft))

    # -- shape --------------------------------------------------------------------------------------------------
    @property
    def dim(self) -> int:
        """Embedding dimension d."""
        return int(self.mean.shape[0])

    @property
    def n_classes(self) -> int:
        """Number of classes C."""
        return int(self.class_means.shape[0])

    @property
    def rank(self) -> int:
        """Directions k each class map moves along."""
        return int(self.directions.shape[2])

    # -- apply --------------------------------------------------------------------------------------------------
    def _factors(self, dtype: np.dtype[np.floating]) -> _Cast:
        # Cast once per dtype so float32 batches stay float32 end to end.
        cached = self._cast.get(dtype)
        if cached is None:
            offsets = self.class_means - self.mean  # (C, d)
            reads = np.einsum("cd,cdk->ck", offsets, self.directions)
            shifts = -offsets - np.einsum("ck,cdk->cd", reads * self.gains, self.directions)
            cached = _Cast(
                mean=self.mean.astype(dtype),
                shifts=shifts.astype(dtype),
                directions=np.ascontiguousarray(self.directions.astype(dtype)),
                directions_t=np.ascontiguousarray(
                    (self.directions * self.gains[:, None, :]).transpose(0, 2, 1).astype(dtype)
                ),
                mean_reads=np.einsum("d,cdk->ck", self.mean, self.directions).astype(dtype),
                coef_t=np.ascontiguousarray(self.classifier_coef.T.astype(dtype)),
                intercept=self.classifier_intercept.astype(dtype),
            )
            self._cast[dtype] = cached
        return cached

    def _check(self, x: FloatArray) -> None:
        if x.ndim != 2 or x.shape[1] != self.dim:
            raise ValueError(f"expected a batch of shape (n, {self.dim}), got {x.shape}")

    def class_probabilities(self, x: FloatArray) -> FloatArray:
        """The stored classifier's class probabilities for each row, shape (n, C), in ``x``'s dtype."""
        self._check(x)
        cast = self._factors(x.dtype)
        logits = x @ cast.coef_t
        logits += cast.intercept
        logits -= logits.max(axis=1, keepdims=True)
        np.exp(logits, out=logits)
        logits /= logits.sum(axis=1, keepdims=True)
        return logits

    def inferred_classes(self, x: FloatArray) -> NDArray[np.intp]:
        """Index of the class each row is moved as (the classifier's most probable class), shape (n,)."""
        self._check(x)
        cast = self._factors(x.dtype)
        return np.asarray(np.argmax(x @ cast.coef_t + cast.intercept, axis=1), dtype=np.intp)

    def _move(self, x: FloatArray, c: int, cast: _Cast) -> FloatArray:
        # T_c(x) - x = shift_c + D_c G_c D_cᵀ (x - μ), without a centred copy of x.
        coefficients = x @ cast.directions[c]
        coefficients -= cast.mean_reads[c]
        out: FloatArray = coefficients @ cast.directions_t[c]
        out += cast.shifts[c]
        return out

    def transport(self, x: FloatArray, classes: NDArray[np.intp]) -> FloatArray:
        """Move each row with the map of the given class (no inference, no map after), shape (n, d).

        Parameters
        ----------
        x : ndarray of shape (n, d)
        classes : ndarray of shape (n,)
            Class index of each row, in ``range(C)``.
        """
        self._check(x)
        classes = np.asarray(classes)
        if classes.shape != (x.shape[0],) or classes.dtype.kind not in "iu":
            raise ValueError(f"expected {x.shape[0]} integer class indices, got shape {classes.shape}")
        if classes.size and (classes.min() < 0 or classes.max() >= self.n_classes):
            raise ValueError(f"class indices must lie in range({self.n_classes})")
        cast = self._factors(x.dtype)
        out = x.copy()
        for c in range(self.n_classes):
            rows = np.flatnonzero(classes == c)
            if rows.size:
                out[rows] += self._move(x[rows], c, cast)
        return out

    def _transport_inferred(self, x: FloatArray) -> FloatArray:
        if not self.soft:
            return self.transport(x, self.inferred_classes(x))
        cast = self._factors(x.dtype)
        probabilities = self.class_probabilities(x)
        out = x.copy()
        for c in range(self.n_classes):
            out += probabilities[:, c : c + 1] * self._move(x, c, cast)
        return out

    def apply(self, x: FloatArray) -> FloatArray:
        """Clean a batch of shape (n, d); returns a new array of the same dtype."""
        self._check(x)
        out = self._transport_inferred(x)
        return out if self.after is None else self.after.apply(out)

    def component(self, x: FloatArray) -> FloatArray:
        """What cleaning takes out of each row, ``x - apply(x)``, shape (n, d)."""
        return x - self.apply(x)

    def search_vector(self, cleaned: FloatArray) -> FloatArray:
        """The cleaned queries themselves, shape (n, d): no linear part serves every row of a class-transport map.

        Each inferred class has its own affine map, so no query-side vector
        ranks a raw index exactly.  On the committed sample (docs/retrieval.md)
        the cleaned query kept more of the cleaned index's top 10 than the
        class maps' linear parts averaged by the class shares, or the query's
        own class's linear part.
        """
        self._check(cleaned)
        return cleaned.copy()

    def towards(self, x: FloatArray, target: int) -> FloatArray:
        """Carry each row from its inferred class onto class ``target``'s Gaussian, shape (n, d).

        ``T_t⁻¹ ∘ T_c``: through the barycenter to the target class, with
        ``A_t⁻¹ - I = D_t (1 / (1 + G_t) - 1) D_tᵀ``.  It pushes class ``c``'s
        Gaussian exactly onto class ``t``'s; it is the optimal (Monge) map
        between the two when their covariances commute.  The map after the
        transport is not applied: the result carries class ``t``.
        """
        if not 0 <= target < self.n_classes:
            raise ValueError(f"the target class index must lie in range({self.n_classes}), got {target}")
        moved = self._transport_inferred(x)
        inverse_gains = 1.0 / (1.0 + self.gains[target]) - 1.0
        directions = self.directions[target].astype(x.dtype)
        coefficients = (moved - self.mean.astype(x.dtype)) @ directions
        out: FloatArray = moved + coefficients * inverse_gains.astype(x.dtype) @ directions.T
        out += (self.class_means[target] - self.mean).astype(x.dtype)
        return out

    def counterfactual(self, x: FloatArray, class_means: Float64Array, target: int) -> FloatArray:
        """:meth:`towards` class ``target`` (the map holds its own class means; ``class_means`` is not needed)."""
        return self.towards(x, target)

    # -- figures and storage ------------------------------------------------------------------------------------
    def removed_variance_share(self, covariance: Float64Array) -> float:
        """Share of the variance of data with covariance ``Σ`` that the class maps' linear parts move.

        ``Σ_c π_c tr(G_c D_cᵀ Σ D_c G_c) / tr Σ``, with the fitted class
        shares ``π_c``: the offsets between class means and the map after the
        transport are not counted (they depend on more than ``Σ``).
        """
        total = float(np.trace(covariance))
        if total <= 0:
            return 0.0
        moved = 0.0
        for c in range(self.n_classes):
            projected = self.directions[c].T @ covariance @ self.directions[c]
            moved += float(self.priors[c]) * float(np.sum(self.gains[c] ** 2 * np.diag(projected)))
        return moved / total

    def arrays(self) -> dict[str, NDArray[Any]]:
        """The map's arrays by name, as an artifact file stores them."""
        out: dict[str, NDArray[Any]] = {name: getattr(self, name) for name in _FACTOR_NAMES}
        out["soft"] = np.asarray(self.soft)
        if self.after is not None:
            out.update({f"after_{name}": value for name, value in self.after.arrays().items()})
        return out

    @classmethod
    def from_arrays(cls, arrays: Mapping[str, NDArray[Any]]) -> ClassTransportMap:
        """The map :meth:`arrays` describes (raises ``KeyError`` or ``ValueError`` on missing or bad arrays)."""
        soft = np.asarray(arrays["soft"])
        if soft.shape != () or soft.dtype != np.bool_:
            raise ValueError("the transport map's 'soft' entry must be a boolean scalar")
        after = None
        if "after_mean" in arrays:
            after = AffineLowRankMap.from_arrays({name: arrays[f"after_{name}"] for name in ("mean", "u", "v")})
        return cls(**{name: arrays[name] for name in _FACTOR_NAMES}, soft=bool(soft), after=after)

    def describe(self) -> dict[str, int]:
        """Its shape for people and cards: dimension, classes, directions per class, rank of the map after."""
        return {
            "dim": self.dim,
            "class_maps": self.n_classes,
            "rank": self.rank,
            "rank_after": 0 if self.after is None else self.after.rank,
        }
