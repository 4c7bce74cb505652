"""Coordinates the fitting data does not use, written as the fitting mean into every cleaned row.

Embedding models leave a few coordinates without live spread (all-MiniLM-L6-v2
has three, with values near 1e-33 and 1e-8).  No dot product sees them, yet
their rounding-level values carry the attribute, and any downstream model that
standardises its features reads it back: on the committed sample a standardised
logistic regression read the pronoun at 1.000 after LEACE through them alone.
Whatever the map kind, a cleaned row therefore holds the fitting mean there,
the same number for every row, so nothing is left to read.

Pinning keeps an affine map affine: with ``P`` zeroing the pinned coordinates
and ``c`` holding their values, ``r(x) = P (A x + b) + c``.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil.maps.linalg import dead_coordinates
from veil.maps.moments import MomentState

FloatArray = NDArray[np.floating]
Float64Array = NDArray[np.float64]


@dataclass(frozen=True, eq=False)
class CoordinatePins:
    """Coordinates every cleaned row holds at a fixed value.

    Parameters
    ----------
    coordinates : ndarray of shape (p,)
        Increasing coordinate indices.
    values : ndarray of shape (p,)
        The fitting mean at each of them.
    """

    coordinates: NDArray[np.intp]
    values: Float64Array

    def __post_init__(self) -> None:
        coordinates = np.array(self.coordinates, dtype=np.intp).reshape(-1)
        values = np.array(self.values, dtype=np.float64).reshape(-1)
        if coordinates.shape != values.shape:
            raise ValueError(f"{coordinates.size} pinned coordinates but {values.size} values")
        if coordinates.size and (coordinates.min() < 0 or np.any(np.diff(coordinates) <= 0)):
            raise ValueError("pinned coordinates must be distinct, increasing and non-negative")
        if not np.all(np.isfinite(values)):
            raise ValueError("a pinned value is NaN or infinite")
        coordinates.setflags(write=False)
        values.setflags(write=False)
        object.__setattr__(self, "coordinates", coordinates)
        object.__setattr__(self, "values", values)

    @classmethod
    def of_moments(cls, moments: MomentState) -> CoordinatePins:
        """The coordinates without live spread in the fitting data (:func:`dead_coordinates`), at its mean."""
        coordinates = dead_coordinates(moments.covariance_xx)
        return cls(coordinates=coordinates, values=moments.mean_x[coordinates])

    def check_dimension(self, dim: int) -> None:
        """Raise ``ValueError`` if a pinned coordinate lies outside ``range(dim)``."""
        if self.coordinates.size and int(self.coordinates[-1]) >= dim:
            raise ValueError(f"pinned coordinate {int(self.coordinates[-1])} lies outside the dimension {dim}")

    def apply(self, out: FloatArray) -> FloatArray:
        """Write the pinned values into the rows of ``out`` (n, d), in place; returns ``out``."""
        if self.coordinates.size:
            out[:, self.coordinates] = self.values.astype(out.dtype)
        return out

    def cleared(self, x: FloatArray) -> FloatArray:
        """A copy of ``x`` (n, d) with the pinned coordinates set to zero: ``P x``."""
        out = np.array(x, copy=True)
        out[:, self.coordinates] = 0
        return out

    def arrays(self) -> dict[str, NDArray[Any]]:
        """The pins' arrays by name, as an artifact file stores them."""
        return {"coordinates": self.coordinates.astype(np.int64), "values": self.values}

    @classmethod
    def from_arrays(cls, arrays: Mapping[str, NDArray[Any]]) -> CoordinatePins:
        """The pins :meth:`arrays` describes (raises ``KeyError`` or ``ValueError`` on missing or bad arrays)."""
        return cls(coordinates=arrays["coordinates"], values=arrays["values"])
