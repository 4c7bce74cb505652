"""The figures of docs/retrieval.md: ``.venv/bin/python scripts/measure_retrieval.py`` (about half a minute).

On the committed sample, each method fitted on the rows the fitting job fits
on (the hash split, 20% held out) and the held-out rows querying the fitting
rows: the top-10 overlap of a raw faiss index searched with search vectors
against the index of the cleaned corpus, for each index metric, and the
recall@10 of HNSW indexes against exact search of the cleaned corpus.
"""

from __future__ import annotations

import warnings

import faiss
import numpy as np
from numpy.typing import NDArray
from sklearn.exceptions import ConvergenceWarning

from veil.erasers import INLP, LEACE, MeanProjection
from veil.erasers.transport import GaussianTransport
from veil.maps.artifact import MapArtifact
from veil.maps.search import search_vectors
from veil.samples.harbourline import load_harbourline_profiles
from veil.samples.splitting import holdout_mask

K = 10
HNSW_LINKS = 32
EF_SEARCH = (16, 64)


def _index(vectors: NDArray[np.floating], metric: str, factory: str = "Flat") -> faiss.Index:
    kind = faiss.METRIC_L2 if metric == "l2" else faiss.METRIC_INNER_PRODUCT
    index = faiss.index_factory(vectors.shape[1], factory, kind)
    index.add(np.ascontiguousarray(_prepared(vectors, metric), dtype=np.float32))
    return index


def _prepared(vectors: NDArray[np.floating], metric: str) -> NDArray[np.floating]:
    """A cosine index is an inner-product index of unit vectors (and is queried with unit vectors)."""
    if metric != "cosine":
        return vectors
    return np.asarray(vectors / np.linalg.norm(vectors, axis=1, keepdims=True))


def _search(index: faiss.Index, queries: NDArray[np.floating], metric: str) -> NDArray[np.int64]:
    return np.asarray(index.search(np.ascontiguousarray(_prepared(queries, metric), dtype=np.float32), K)[1])


def _overlap(a: NDArray[np.int64], b: NDArray[np.int64]) -> float:
    return float(np.mean([len(set(x.tolist()) & set(y.tolist())) / K for x, y in zip(a, b, strict=True)]))


def _overlaps(artifact: MapArtifact, corpus: NDArray[np.floating], queries: NDArray[np.floating]) -> list[str]:
    """Per index metric: search vectors on the raw index, then the cleaned queries themselves on it (for scale)."""
    cells = []
    for metric in ("inner_product", "cosine", "l2"):
        cleaned = _search(_index(artifact.apply(corpus), metric), artifact.apply(queries), metric)
        answer = search_vectors(artifact, queries, metric=metric)
        raw = _index(corpus, metric)
        through = _overlap(_search(raw, answer.vectors, metric), cleaned)
        plain = _overlap(_search(raw, artifact.apply(queries), metric), cleaned)
        cells.append(f"{through:.3f}{'' if answer.exact else ' (inexact)'} / {plain:.3f}")
    return cells


def _recalls(artifact: MapArtifact, corpus: NDArray[np.floating], queries: NDArray[np.floating]) -> list[str]:
    exact = _search(_index(artifact.apply(corpus), "inner_product"), artifact.apply(queries), "inner_product")
    cleaned_hnsw = _index(artifact.apply(corpus), "inner_product", f"HNSW{HNSW_LINKS}")
    raw_hnsw = _index(corpus, "inner_product", f"HNSW{HNSW_LINKS}")
    vectors = search_vectors(artifact, queries).vectors
    cells = []
    for ef in EF_SEARCH:
        cleaned_hnsw.hnsw.efSearch = raw_hnsw.hnsw.efSearch = ef
        cells.append(f"{_overlap(_search(cleaned_hnsw, artifact.apply(queries), 'inner_product'), exact):.4f}")
        cells.append(f"{_overlap(_search(raw_hnsw, vectors, 'inner_product'), exact):.4f}")
    return cells


def main() -> None:
    profiles = load_harbourline_profiles()
    held = holdout_mask(profiles.pronoun.size, fraction=0.2, seed=0)
    corpus, queries = profiles.embedding[~held], profiles.embedding[held]
    estimators = {
        "LEACE": LEACE(),
        "mean projection": MeanProjection(),
        "INLP (moments, 30 classifiers)": INLP(classifier="moments", max_iter=30),
        "class transport (rank 64)": GaussianTransport(rank=64, random_state=0),
    }
    print(f"corpus {corpus.shape[0]} fitting rows, {queries.shape[0]} held-out queries, top {K}\n")
    print("top-10 overlap with the cleaned index: search vectors / cleaned queries, both on the raw index\n")
    print("| method | inner product | cosine | L2 |")
    print("| --- | --- | --- | --- |")
    artifacts = {}
    for name, estimator in estimators.items():
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            artifacts[name] = estimator.fit(corpus, profiles.pronoun[~held]).export()
        print(f"| {name} | " + " | ".join(_overlaps(artifacts[name], corpus, queries)) + " |")
    header = " | ".join(f"cleaned HNSW, ef {ef} | raw HNSW + search vectors, ef {ef}" for ef in EF_SEARCH)
    print(f"\n| method | {header} |")
    print("| --- |" + " --- |" * (2 * len(EF_SEARCH)))
    for name in list(estimators)[:3]:
        print(f"| {name} | " + " | ".join(_recalls(artifacts[name], corpus, queries)) + " |")


if __name__ == "__main__":
    main()
