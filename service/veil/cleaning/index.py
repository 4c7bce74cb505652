"""Vector indexes (faiss, the optional ``faiss`` extra): clean a corpus into one, or search a raw one as if cleaned.

``veil apply --out corpus.faiss`` cleans a ``.npy`` corpus chunk by chunk
into an inner-product index and writes the same manifest as any other
output, so the index records the version that cleaned it.
:func:`search_raw_index` searches an index of *raw* vectors with the search
vectors of :mod:`veil.maps.search`: on an inner-product index and an affine
version it returns exactly the ids and scores the cleaned index would.
"""

from __future__ import annotations

import importlib
from pathlib import Path
from types import ModuleType
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil.defaults import INDEX_FACTORY
from veil.errors import DataError
from veil.maps.artifact import MapArtifact
from veil.maps.search import search_vectors

INDEX_SUFFIX = ".faiss"
DEFAULT_FACTORY = INDEX_FACTORY


def load_faiss() -> ModuleType:
    """The faiss module, or a DataError that says how to install it."""
    try:
        return importlib.import_module("faiss")
    except ImportError:
        raise DataError("vector indexes need faiss: pip install 'veil[faiss]'") from None


def inner_product_index(dim: int, factory: str = DEFAULT_FACTORY) -> Any:
    """An empty faiss inner-product index of ``dim`` dimensions from a factory string (``"Flat"``, ``"HNSW32"``).

    Raises
    ------
    DataError
        faiss is missing, the factory string is not one faiss reads, or the
        index needs training (an IVF or PQ index learns from the cleaned
        corpus, which this one pass does not hold).
    """
    faiss = load_faiss()
    try:
        index = faiss.index_factory(dim, factory, faiss.METRIC_INNER_PRODUCT)
    except RuntimeError:
        raise DataError(f"faiss cannot build an index from the factory string {factory!r}") from None
    if not index.is_trained:
        raise DataError(f"the index {factory!r} needs training; name one that does not (Flat, HNSW32)")
    return index


def index_metric(index: Any) -> str:
    """The metric of a faiss index as :mod:`veil.maps.search` names it (an IP index of unit rows is a cosine one)."""
    faiss = load_faiss()
    if index.metric_type == faiss.METRIC_INNER_PRODUCT:
        return "inner_product"
    if index.metric_type == faiss.METRIC_L2:
        return "l2"
    raise DataError(f"a faiss index of metric type {index.metric_type} cannot be searched through search vectors")


def search_raw_index(
    index: Any, artifact: MapArtifact, queries: NDArray[np.floating], k: int, *, require_exact: bool = False
) -> tuple[NDArray[np.float64], NDArray[np.int64]]:
    """Search an index of raw vectors as the index of the same corpus cleaned with ``artifact`` would answer.

    Parameters
    ----------
    index : faiss.Index
        An index of raw (uncleaned) corpus vectors.
    artifact : MapArtifact
        The version the corpus would be cleaned with.
    queries : ndarray of shape (n, d)
        Raw queries.
    k : int
        Results per query.
    require_exact : bool, default=False
        Refuse (``ValueError``) where the ranking would not be exact.

    Returns
    -------
    scores : ndarray of shape (n, k)
        On an inner-product index and an affine version, the cleaned
        inner products ``⟨r(q), r(x)⟩``; otherwise the index's own scores.
    ids : ndarray of shape (n, k)
        The corpus rows, best first.
    """
    answer = search_vectors(artifact, queries, metric=index_metric(index), require_exact=require_exact)
    scores, ids = index.search(np.ascontiguousarray(answer.vectors, dtype=np.float32), k)
    scores = np.asarray(scores, dtype=np.float64)
    if answer.offsets is not None and index_metric(index) == "inner_product":
        scores += answer.offsets[:, None]
    return scores, np.asarray(ids, dtype=np.int64)


def write_index(index: Any, target: Path) -> None:
    load_faiss().write_index(index, str(target))


def read_index(source: str | Path) -> Any:
    """A faiss index from a file, or a DataError naming the problem."""
    faiss = load_faiss()
    try:
        return faiss.read_index(str(source))
    except RuntimeError:
        raise DataError(f"{source} is not a readable faiss index") from None
