"""The kinds of map an artifact can hold, and what every kind offers the stages after fitting.

Today every method ends in an :class:`~veil.maps.lowrank.AffineLowRankMap`
(kind ``"affine-lowrank"``).  An artifact names its kind, and the storage
format, the service, ``veil apply`` and the live checks go through
:class:`EmbeddingMap` only, so a map that is not affine can be added as
another entry of :data:`MAP_KINDS`.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any, ClassVar, Protocol

import numpy as np
from numpy.typing import NDArray

from veil.maps.lowrank import AffineLowRankMap

FloatArray = NDArray[np.floating]


class EmbeddingMap(Protocol):
    """A fitted map from embeddings to cleaned embeddings of the same dimension."""

    kind: ClassVar[str]

    @property
    def dim(self) -> int: ...

    def apply(self, x: FloatArray) -> FloatArray:
        """Clean a batch of shape (n, d), in its own dtype."""
        ...

    def component(self, x: FloatArray) -> FloatArray:
        """What cleaning takes out of each row, ``x - apply(x)``, shape (n, d)."""
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


MAP_KINDS: dict[str, type[AffineLowRankMap]] = {AffineLowRankMap.kind: AffineLowRankMap}


def map_from_arrays(kind: str, arrays: Mapping[str, NDArray[Any]]) -> EmbeddingMap:
    """Rebuild a stored map of ``kind`` from its arrays.

    Raises
    ------
    ValueError
        An unknown kind (written by a newer release), or arrays that do not make a map of that kind.
    """
    if kind not in MAP_KINDS:
        raise ValueError(f"unknown map kind {kind!r}; this release reads {', '.join(sorted(MAP_KINDS))}")
    return MAP_KINDS[kind].from_arrays(arrays)
