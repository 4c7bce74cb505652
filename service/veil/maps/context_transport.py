"""Class transport within each value of a context: infer the value, then the class, then move the row.

A ranker compares items of one context value (one field, one query's
topic).  :class:`ContextTransportMap` holds one
:class:`~veil.maps.transport.ClassTransportMap` per value, each fitted on
that value's rows (or, for a value too small to fit, the population's), and
a stored linear classifier of the context: the service is not told a row's
context, so it infers it, as each value's map infers the class.  An
optional affine low-rank map runs after (LEACE guarding within the context,
fitted on the transported fitting rows).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np
from numpy.typing import NDArray

from veil.maps.lowrank import AffineLowRankMap
from veil.maps.transport import ClassTransportMap

Float64Array = NDArray[np.float64]
FloatArray = NDArray[np.floating]

_OWN = ("context_coef", "context_intercept", "value_priors")


def _frozen(array: NDArray[Any]) -> Float64Array:
    out = np.array(array, dtype=np.float64, order="C", copy=True)
    out.setflags(write=False)
    return out


def _value_prefix(g: int) -> str:
    return f"value{g}_"


@dataclass(frozen=True, eq=False)
class ContextTransportMap:
    """Infer each row's context value, move it with that value's class-transport map.

    Parameters
    ----------
    values : ndarray of shape (G,)
        The context's values, sorted (numbers or text).
    value_maps : tuple of ClassTransportMap, length G
        The map of each value: fitted on its rows, or the population's map
        where the value had too few rows of some class.  Every one has the
        same classes, in the same order, and no map after it.
    context_coef : ndarray of shape (G, d)
        Rows of the context classifier's logits (``logits = x W ᵀ + b``).
    context_intercept : ndarray of shape (G,)
    value_priors : ndarray of shape (G,)
        Share of fitting rows in each value.
    after : AffineLowRankMap or None
        An affine map applied after the transport, or ``None``.
    """

    kind: ClassVar[str] = "context-transport"
    affine: ClassVar[bool] = False

    values: NDArray[Any]
    value_maps: tuple[ClassTransportMap, ...]
    context_coef: Float64Array
    context_intercept: Float64Array
    value_priors: Float64Array
    after: AffineLowRankMap | None = None
    _cast: dict[np.dtype[np.floating], tuple[FloatArray, FloatArray]] = field(
        default_factory=dict, init=False, repr=False
    )

    def __post_init__(self) -> None:
        values = np.array(self.values, copy=True)
        values.setflags(write=False)
        object.__setattr__(self, "values", values)
        object.__setattr__(self, "value_maps", tuple(self.value_maps))
        for name in _OWN:
            object.__setattr__(self, name, _frozen(getattr(self, name)))
        self._check_shapes()

    def _check_shapes(self) -> None:
        n_values = self.values.shape[0] if self.values.ndim == 1 else -1
        if n_values < 2 or len(self.value_maps) != n_values:
            raise ValueError(f"a context map needs one class map per value and 2 values or more, got {n_values}")
        d, n_classes = self.value_maps[0].dim, self.value_maps[0].n_classes
        if any(m.dim != d or m.n_classes != n_classes or m.after is not None for m in self.value_maps):
            raise ValueError("every value's map must have the same dimension and classes, and no map after it")
        expected = {"context_coef": (n_values, d), "context_intercept": (n_values,), "value_priors": (n_values,)}
        shapes = {name: getattr(self, name).shape for name in expected}
        if shapes != expected:
            raise ValueError(f"inconsistent context map shapes: {shapes}, expected {expected}")
        if not all(np.all(np.isfinite(getattr(self, name))) for name in _OWN):
            raise ValueError("the context map's arrays contain NaN or infinity")
        if self.after is not None and self.after.dim != d:
            raise ValueError(f"the map after the transport has dimension {self.after.dim}, not {d}")

    # -- shape --------------------------------------------------------------------------------------------------
    @property
    def dim(self) -> int:
        """Embedding dimension d."""
        return self.value_maps[0].dim

    @property
    def n_values(self) -> int:
        """Number of context values G."""
        return len(self.value_maps)

    # -- apply --------------------------------------------------------------------------------------------------
    def _check(self, x: FloatArray) -> None:
        if x.ndim != 2 or x.shape[1] != self.dim:
            raise ValueError(f"expected a batch of shape (n, {self.dim}), got {x.shape}")

    def inferred_values(self, x: FloatArray) -> NDArray[np.intp]:
        """Index of the context value each row is moved within (the classifier's most probable), shape (n,)."""
        self._check(x)
        coef_t, intercept = self._classifier(x.dtype)
        logits = x @ coef_t + intercept
        return np.asarray(np.argmax(logits, axis=1), dtype=np.intp)

    def _classifier(self, dtype: np.dtype[np.floating]) -> tuple[FloatArray, FloatArray]:
        # Cast once per dtype, as the class maps do: the apply path of every request reads these.
        cached = self._cast.get(dtype)
        if cached is None:
            cached = (np.ascontiguousarray(self.context_coef.T.astype(dtype)), self.context_intercept.astype(dtype))
            self._cast[dtype] = cached
        return cached

    def transport_within(self, x: FloatArray, values: NDArray[np.intp]) -> FloatArray:
        """Move each row with the map of the given value (no context inference, no map after), shape (n, d).

        Parameters
        ----------
        x : ndarray of shape (n, d)
        values : ndarray of shape (n,)
            Context value index of each row, in ``range(G)``: the true context where it is known.
        """
        self._check(x)
        values = np.asarray(values)
        if values.shape != (x.shape[0],) or values.dtype.kind not in "iu":
            raise ValueError(f"expected {x.shape[0]} integer context indices, got shape {values.shape}")
        if values.size and (values.min() < 0 or values.max() >= self.n_values):
            raise ValueError(f"context indices must lie in range({self.n_values})")
        out = x.copy()
        for g, value_map in enumerate(self.value_maps):
            rows = np.flatnonzero(values == g)
            if rows.size:
                out[rows] = value_map.apply(x[rows])
        return out

    def apply_within(self, x: FloatArray, values: NDArray[np.intp]) -> FloatArray:
        """Clean a batch whose context values are known (then the map after), shape (n, d)."""
        out = self.transport_within(x, values)
        return out if self.after is None else self.after.apply(out)

    def apply(self, x: FloatArray) -> FloatArray:
        """Clean a batch of shape (n, d), each row within its inferred context value; same dtype."""
        return self.apply_within(x, self.inferred_values(x))

    def component(self, x: FloatArray) -> FloatArray:
        """What cleaning takes out of each row, ``x - apply(x)``, shape (n, d)."""
        return x - self.apply(x)

    def search_vector(self, cleaned: FloatArray) -> FloatArray:
        """The cleaned queries themselves, shape (n, d): as for class transport, no linear part serves every row."""
        self._check(cleaned)
        return cleaned.copy()

    def counterfactual(self, x: FloatArray, class_means: Float64Array, target: int) -> FloatArray:
        """Within each row's inferred value, carry it from its inferred class onto class ``target``'s Gaussian.

        ``class_means`` is not needed: each value's map holds its own.  The map after the transport is not applied.
        """
        self._check(x)
        values = self.inferred_values(x)
        out = x.copy()
        for g, value_map in enumerate(self.value_maps):
            rows = np.flatnonzero(values == g)
            if rows.size:
                out[rows] = value_map.towards(x[rows], target)
        return out

    # -- figures and storage ------------------------------------------------------------------------------------
    def removed_variance_share(self, covariance: Float64Array) -> float:
        """The value maps' shares (:meth:`ClassTransportMap.removed_variance_share`), weighted by value shares."""
        shares = [value_map.removed_variance_share(covariance) for value_map in self.value_maps]
        return float(np.dot(self.value_priors, shares))

    def arrays(self) -> dict[str, NDArray[Any]]:
        """The map's arrays by name: its own, then each value map's under ``value{g}_``, then ``after_``."""
        out: dict[str, NDArray[Any]] = {"values": self.values}
        out.update({name: getattr(self, name) for name in _OWN})
        for g, value_map in enumerate(self.value_maps):
            out.update({_value_prefix(g) + name: array for name, array in value_map.arrays().items()})
        if self.after is not None:
            out.update({f"after_{name}": value for name, value in self.after.arrays().items()})
        return out

    @classmethod
    def from_arrays(cls, arrays: Mapping[str, NDArray[Any]]) -> ContextTransportMap:
        """The map :meth:`arrays` describes (raises ``KeyError`` or ``ValueError`` on missing or bad arrays)."""
        values = np.asarray(arrays["values"])
        if values.ndim != 1 or values.dtype.kind not in "biufUS":
            raise ValueError("the context map's 'values' must be a 1-D array of numbers or text")
        value_maps = []
        for g in range(values.shape[0]):
            prefix = _value_prefix(g)
            own = {name[len(prefix) :]: array for name, array in arrays.items() if name.startswith(prefix)}
            value_maps.append(ClassTransportMap.from_arrays(own))
        after = None
        if "after_mean" in arrays:
            after = AffineLowRankMap.from_arrays({name: arrays[f"after_{name}"] for name in ("mean", "u", "v")})
        own_arrays = {name: arrays[name] for name in _OWN}
        return cls(values=values, value_maps=tuple(value_maps), after=after, **own_arrays)

    def describe(self) -> dict[str, int]:
        """Its shape for people and cards: dimension, context values, class maps, directions, rank after."""
        return {
            "dim": self.dim,
            "context_values": self.n_values,
            "class_maps": sum(value_map.n_classes for value_map in self.value_maps),
            "rank": max(value_map.rank for value_map in self.value_maps),
            "rank_after": 0 if self.after is None else self.after.rank,
        }
