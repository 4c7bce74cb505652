"""The kinds of map an artifact can hold, and what every kind offers the stages after fitting.

The linear methods end in an :class:`~veil.maps.lowrank.AffineLowRankMap`
(kind ``"affine-lowrank"``); class-conditional transport ends in a
:class:`~veil.maps.transport.ClassTransportMap` (kind ``"class-transport"``),
which is not affine, and transport within each value of a context ends in a
:class:`~veil.maps.context_transport.ContextTransportMap` (kind
``"context-transport"``), which infers the value too.  An artifact names its kind, and the storage format,
the service, ``veil apply`` and the live checks go through
:class:`EmbeddingMap` only.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping
from typing import Any, ClassVar, Protocol

import numpy as np
from numpy.typing import NDArray

from veil.maps.context_transport import ContextTransportMap
from veil.maps.lowrank import AffineLowRankMap
from veil.maps.transport import ClassTransportMap

FloatArray = NDArray[np.floating]


class EmbeddingMap(Protocol):
    """A fitted map from embeddings to cleaned embeddings of the same dimension."""

    kind: ClassVar[str]
    #: Whether ``apply`` is one affine map ``A x + b`` for every row.
    affine: ClassVar[bool]

    @property
    def dim(self) -> int: ...

    def apply(self, x: FloatArray) -> FloatArray:
        """Clean a batch of shape (n, d), in its own dtype."""
        ...

    def component(self, x: FloatArray) -> FloatArray:
        """What cleaning takes out of each row, ``x - apply(x)``, shape (n, d)."""
        ...

    def search_vector(self, cleaned: FloatArray) -> FloatArray:
        """Query-side vectors, shape (n, d), for a raw inner-product index, from cleaned queries ``r(q)``.

        For an affine map ``A x + b``, ``Aᵀ r(q)``: the raw index then ranks
        exactly as the cleaned one (:mod:`veil.maps.search`).  Other kinds say
        what they give instead.
        """
        ...

    def counterfactual(self, x: FloatArray, class_means: NDArray[np.float64], target: int) -> FloatArray:
        """Clean each row, then give it class ``target``; ``class_means`` (C, d) are the fitting data's."""
        ...

    def removed_variance_share(self, covariance: NDArray[np.float64]) -> float:
        """Share of the variance of data with this covariance that cleaning removes."""
        ...

    def arrays(self) -> Mapping[str, NDArray[Any]]:
        """The arrays that define the map, by name."""
        ...

    def describe(self) -> dict[str, int]:
        """Its shape for people and cards (for example dimension and rank)."""
        ...


#: How each kind is rebuilt from its stored arrays.
MAP_KINDS: dict[str, Callable[[Mapping[str, NDArray[Any]]], EmbeddingMap]] = {
    AffineLowRankMap.kind: AffineLowRankMap.from_arrays,
    ClassTransportMap.kind: ClassTransportMap.from_arrays,
    ContextTransportMap.kind: ContextTransportMap.from_arrays,
}


def map_from_arrays(kind: str, arrays: Mapping[str, NDArray[Any]]) -> EmbeddingMap:
    """Rebuild a stored map of ``kind`` from its arrays.

    Raises
    ------
    ValueError
        An unknown kind (written by a newer release), or arrays that do not make a map of that kind.
    """
    if kind not in MAP_KINDS:
        raise ValueError(f"unknown map kind {kind!r}; this release reads {', '.join(sorted(MAP_KINDS))}")
    return MAP_KINDS[kind](arrays)
