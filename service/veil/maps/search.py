"""Search a raw (uncleaned) vector index as if it held cleaned vectors: one query-side vector per query.

For an affine map ``r(x) = A x + b`` and a cleaned query ``r(q)``,

``⟨r(q), r(x)⟩ = ⟨Aᵀ r(q), x⟩ + ⟨r(q), b⟩``

(with pinned coordinates, ``A`` and ``b`` are those of the map followed by
the pins: see :func:`search_vectors`)

and the second term is the same for every corpus row ``x``.  Ranking a raw
inner-product index by ``⟨Aᵀ r(q), x⟩`` therefore gives exactly the ranking of
the cleaned corpus, and adding the per-query offset ``⟨r(q), b⟩`` gives its
scores.  ``Aᵀ r(q) = r(q) − V Uᵀ r(q)`` costs O(d·k) per query.

It is exact only for an inner-product index and a map that is affine and not
re-normalised.  A cosine or L2 index divides by, or adds, the norm of each
stored vector, and ``‖r(x)‖`` varies from row to row; a re-normalised map
divides by ``‖A x + b‖``; a class-transport map applies another affine map
to each inferred class (its search vector is the cleaned query itself).
There the vectors are still given, marked inexact, and for an affine map the
identity above still holds for the unnormalised cleaned vectors ``A x + b``.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from veil.maps.artifact import MapArtifact

FloatArray = NDArray[np.floating]
#: The index metrics a caller can name, and the one assumed when none is named.
METRICS = ("inner_product", "cosine", "l2")
DEFAULT_METRIC = "inner_product"


@dataclass(frozen=True)
class SearchVectors:
    """Query-side vectors for a raw index, and whether ranking by them is exact.

    Attributes
    ----------
    vectors : ndarray of shape (n, d)
        ``Aᵀ r(q)`` for each query ``q`` (for a map that is not affine, what
        its kind gives instead), in the queries' dtype.
    offsets : ndarray of shape (n,) or None
        ``⟨r(q), b⟩``: add it to the raw index's inner product to get the
        cleaned corpus's; None for a map that is not affine.
    exact : bool
        Whether the raw index ranks by these vectors exactly as the cleaned
        index ranks by the cleaned queries.
    note : str
        Why not, when ``exact`` is False (empty otherwise).
    """

    vectors: FloatArray
    offsets: NDArray[np.float64] | None
    exact: bool
    note: str


def inexact_reason(artifact: MapArtifact, metric: str) -> str:
    """Why ranking a raw ``metric`` index by search vectors differs from the cleaned index's ranking, or ``""``."""
    if metric not in METRICS:
        raise ValueError(f"unknown index metric {metric!r}; use one of {', '.join(METRICS)}")
    if not artifact.map.affine:
        return f"the {artifact.kind} map is not affine: each inferred class has its own linear part"
    if artifact.normalize:
        return "the version re-normalises cleaned vectors, so each stored vector is divided by its own cleaned norm"
    if metric != "inner_product":
        return f"a {metric} index depends on each stored vector's norm, and cleaning changes norms unevenly"
    return ""


def search_vectors(
    artifact: MapArtifact, queries: FloatArray, *, metric: str = DEFAULT_METRIC, require_exact: bool = False
) -> SearchVectors:
    """The vectors to search a raw ``metric`` index with, so it ranks as the index of the cleaned corpus would.

    Parameters
    ----------
    artifact : MapArtifact
        The version the cleaned corpus would be cleaned with.
    queries : ndarray of shape (n, d)
        Raw queries (what callers would send to ``apply``).
    metric : {"inner_product", "cosine", "l2"}, default="inner_product"
        The raw index's metric; only an inner-product index can be exact.
    require_exact : bool, default=False
        Refuse (``ValueError``) instead of answering inexactly.

    Returns
    -------
    SearchVectors

    Raises
    ------
    ValueError
        An unknown metric, a batch of the wrong shape, or ``require_exact``
        where the answer would not be exact (the message says why).
    """
    note = inexact_reason(artifact, metric)
    if require_exact and note:
        raise ValueError(f"no exact search vectors for this version and a {metric} index: {note}")
    if queries.ndim != 2 or queries.shape[1] != artifact.map.dim:
        raise ValueError(f"expected queries of shape (n, {artifact.map.dim}), got {queries.shape}")
    cleaned = artifact.apply(queries)
    pins = artifact.pins
    # With pins r(x) = P (A x + b) + c, so ⟨r(q), r(x)⟩ = ⟨Aᵀ P r(q), x⟩ + ⟨r(q), P b + c⟩ (veil.maps.pins).
    vectors = artifact.map.search_vector(cleaned if pins is None else pins.cleared(cleaned))
    offsets = None
    if artifact.map.affine:
        # P b + c = r(0) for an affine map; in float64 so the offsets carry no extra round-off.
        constant = artifact.map.apply(np.zeros((1, artifact.map.dim)))
        constant = constant if pins is None else pins.apply(constant)
        offsets = np.asarray(cleaned, dtype=np.float64) @ constant[0]
    return SearchVectors(vectors=vectors, offsets=offsets, exact=not note, note=note)
