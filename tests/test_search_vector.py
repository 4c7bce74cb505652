"""Search vectors: a raw faiss inner-product index searched with Aᵀ r(q) answers as the index of the cleaned corpus.

The reference is faiss itself: an exact ``IndexFlatIP`` built over the corpus
cleaned with the same version, on the committed sample.
"""

from __future__ import annotations

import io
import json
import warnings
from pathlib import Path

import faiss
import numpy as np
import pytest
from fastapi.testclient import TestClient
from numpy.typing import NDArray
from sklearn.exceptions import ConvergenceWarning

from veil import search_vectors
from veil.cleaning.corpus import apply_to_file, manifest_path
from veil.cleaning.index import read_index, search_raw_index
from veil.erasers import INLP, LEACE, MeanProjection
from veil.maps.artifact import MapArtifact
from veil.registry import Registry
from veil_client import VeilClient, VeilClientError

from .conftest import Split
from .service_fixtures import PROFILES, ServiceRegistry, app_for
from .test_cli import run
from .tolerances import apply_bound, assert_same_answer, assert_within, gamma, search_vectors_bound

K = 10


def flat_ip(vectors: NDArray[np.floating]) -> faiss.IndexFlatIP:
    index = faiss.IndexFlatIP(vectors.shape[1])
    index.add(np.ascontiguousarray(vectors, dtype=np.float32))
    return index


def score_tolerance(
    artifact: MapArtifact, corpus: NDArray[np.floating], queries: NDArray[np.floating]
) -> NDArray[np.float64]:
    """How far ``⟨Aᵀ r(q), x⟩ + ⟨r(q), b⟩`` and ``⟨r(q), r(x)⟩``, both in float32, may lie apart: (queries, rows).

    Each path's vectors carry their round-off bound (tests/tolerances.py), which the d-term inner product
    carries through, and the inner product adds ``γ_d`` of the products' magnitudes (the dot-product bound).
    """
    vectors, offsets = search_vectors_bound(artifact, queries)
    cleaned_queries, cleaned_corpus = apply_bound(artifact, queries), apply_bound(artifact, corpus)
    g = gamma(corpus.shape[1], np.float32)
    x = np.abs(np.asarray(corpus, dtype=np.float64))
    w, r_q, r_x = np.abs(vectors.value), np.abs(cleaned_queries.value), np.abs(cleaned_corpus.value)
    raw = vectors.error @ x.T + g * (w + vectors.error) @ x.T + offsets.error[:, None]
    cleaned = cleaned_queries.error @ (r_x + cleaned_corpus.error).T + r_q @ cleaned_corpus.error.T
    return raw + cleaned + g * (r_q + cleaned_queries.error) @ (r_x + cleaned_corpus.error).T


def assert_same_ranking(
    reference_scores: NDArray[np.floating],
    reference_ids: NDArray[np.int64],
    ids: NDArray[np.int64],
    tolerance: NDArray[np.float64],
) -> None:
    """``ids`` ranks as the reference does, except that results tied within round-off may come in either order.

    Two results are tied when their reference scores lie within both paths' bounds of each other (``tolerance``
    holds the bound of every query and corpus row).  The reference holds ``K + 40`` results per query, and the
    tie across the K-th place must end within them, so it is seen whole.
    """
    for query, (scores, expected, got) in enumerate(zip(reference_scores, reference_ids, ids, strict=True)):
        slack = tolerance[query, expected]
        group_of = np.concatenate([[0], np.cumsum(np.diff(-scores) > slack[:-1] + slack[1:])])
        assert group_of[K - 1] < group_of[-1], f"query {query}: the tie across place {K} runs past the reference"
        for rank, row in enumerate(got):
            tied = expected[group_of == group_of[rank]]
            assert row in tied, f"rank {rank}: row {row} is not among the reference's {tied}"
        assert len(set(got)) == K


@pytest.fixture(scope="module", params=["leace", "meanproj", "inlp"])
def fitted(request: pytest.FixtureRequest, profiles: Split) -> MapArtifact:
    estimator = {
        "leace": LEACE(),
        "meanproj": MeanProjection(),
        # Enough directions to make the map far from the identity; convergence is not the point here.
        "inlp": INLP(classifier="moments", max_iter=8),
    }[request.param]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        return estimator.fit(profiles.x_fit, profiles.z_fit).export()


def test_a_raw_flat_ip_index_ranks_and_scores_as_the_cleaned_one(fitted: MapArtifact, profiles: Split) -> None:
    corpus, queries = profiles.x_fit, profiles.x_held
    # The reference: faiss's exact inner-product search over the cleaned corpus with the cleaned queries.
    reference_scores, reference_ids = flat_ip(fitted.apply(corpus)).search(fitted.apply(queries), K + 40)
    scores, ids = search_raw_index(flat_ip(corpus), fitted, queries, K, require_exact=True)
    tolerance = score_tolerance(fitted, corpus, queries)
    assert_same_ranking(reference_scores, reference_ids, ids, tolerance)
    # With the per-query offset ⟨r(q), b⟩ the raw index's scores are the cleaned index's, to both paths' round-off.
    assert_within(scores, reference_scores[:, :K], 2 * np.take_along_axis(tolerance, ids, axis=1), "scores")
    # Without the adjoint the raw index ranks differently: the test depends on it.
    _, naive = flat_ip(corpus).search(fitted.apply(queries), K)
    assert np.mean(naive == reference_ids[:, :K]) < 0.9


def test_what_is_not_exact_is_said_or_refused(profiles: Split) -> None:
    artifact = LEACE().fit(profiles.x_fit, profiles.z_fit).export()
    queries = profiles.x_held[:5]
    assert search_vectors(artifact, queries).exact
    cosine = search_vectors(artifact, queries, metric="cosine")
    assert not cosine.exact
    assert "norm" in cosine.note
    # The inner products with the unnormalised cleaned vectors stay exact whatever the index's metric.
    np.testing.assert_array_equal(cosine.vectors, search_vectors(artifact, queries).vectors)
    with pytest.raises(ValueError, match=r"no exact search vectors .* l2 index"):
        search_vectors(artifact, queries, metric="l2", require_exact=True)
    with pytest.raises(ValueError, match="unknown index metric 'hamming'"):
        search_vectors(artifact, queries, metric="hamming")
    with pytest.raises(ValueError, match=r"expected queries of shape \(n, 384\)"):
        search_vectors(artifact, queries[:, :10])
    renormalised = LEACE(normalize=True).fit(profiles.x_fit, profiles.z_fit).export()
    assert "re-normalises" in search_vectors(renormalised, queries).note
    l2 = faiss.IndexFlatL2(queries.shape[1])
    l2.add(profiles.x_fit)
    with pytest.raises(ValueError, match="l2 index"):
        search_raw_index(l2, artifact, queries, K, require_exact=True)


def test_veil_apply_cleans_a_corpus_into_a_faiss_index(service_registry: ServiceRegistry, tmp_path: Path) -> None:
    corpus = np.random.default_rng(0).normal(size=(400, 384)).astype(np.float32)
    np.save(tmp_path / "corpus.npy", corpus)
    stored = Registry(service_registry.path).read_version(PROFILES, "live")
    manifest = apply_to_file(stored, tmp_path / "corpus.npy", tmp_path / "corpus.faiss", requested="live")
    assert (manifest["version"], manifest["input"]["rows"]) == (stored.id, 400)
    assert json.loads(manifest_path(tmp_path / "corpus.faiss").read_text())["version"] == stored.id
    index = read_index(tmp_path / "corpus.faiss")
    queries = corpus[:20]
    expected = flat_ip(stored.artifact.apply(corpus)).search(stored.artifact.apply(queries), K)
    np.testing.assert_array_equal(index.search(stored.artifact.apply(queries), K)[1], expected[1])
    # An index that needs training is refused with one line and exit code 2, before anything is written.
    refused = run(
        "apply", PROFILES, "--in", tmp_path / "corpus.npy", "--out", tmp_path / "ivf.faiss", "--index", "IVF8,Flat",
        "--registry", service_registry.path,
    )  # fmt: skip
    assert refused.code == 2
    assert "needs training" in refused.err
    assert refused.err.count("\n") == 1
    assert not (tmp_path / "ivf.faiss").exists()


def _npy(matrix: NDArray[np.floating]) -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, matrix)
    return buffer.getvalue()


def test_the_route_gives_the_python_api_s_answer(service_registry: ServiceRegistry) -> None:
    registry = Registry(service_registry.path)
    queries = np.random.default_rng(3).normal(size=(30, 384)).astype(np.float32)
    route = f"/v1/erasers/{PROFILES}/search-vector"
    live_artifact = registry.read_version(PROFILES, "live").artifact
    # The service caps BLAS at one thread and the test's process does not: the two sum in other orders, so
    # they agree to the float32 round-off bound of tests/tolerances.py, not to a fixed atol.
    vectors_bound, offsets_bound = search_vectors_bound(live_artifact, queries)
    with TestClient(app_for(service_registry.path)) as http:
        live = search_vectors(live_artifact, queries)
        answer = http.post(route, json={"vectors": queries.tolist()})
        assert answer.status_code == 200
        assert (answer.headers["x-veil-version"], answer.headers["x-veil-search-exact"]) == (
            service_registry.leace, "true",
        )  # fmt: skip
        body = answer.json()
        # JSON carries each float32 as its shortest decimal: read back as float32 it is the served value exactly.
        assert_same_answer(np.array(body["vectors"], dtype=np.float32), live.vectors, vectors_bound, "vectors")
        assert_same_answer(np.array(body["offsets"]), live.offsets, offsets_bound, "offsets")
        assert (body["exact"], body["metric"], body["note"]) == (True, "inner_product", "")
        pinned_artifact = registry.read_version(PROFILES, "2").artifact
        pinned = search_vectors(pinned_artifact, queries)
        npy = http.post(
            f"{route}?version=2&metric=cosine", content=_npy(queries), headers={"Content-Type": "application/x-npy"}
        )
        assert (npy.headers["x-veil-version"], npy.headers["x-veil-search-exact"]) == (
            service_registry.meanproj, "false",
        )  # fmt: skip
        pinned_bound, _ = search_vectors_bound(pinned_artifact, queries)
        assert_same_answer(np.load(io.BytesIO(npy.content)), pinned.vectors, pinned_bound, "pinned vectors")

        refusals = [
            (f"{route}?exact=true&metric=l2", {"vectors": queries.tolist()}, 422, "inexact_search"),
            (route, {"vectors": queries[:, :100].tolist()}, 422, "wrong_dimension"),
            (f"{route}?version=99", {"vectors": queries.tolist()}, 404, "unknown_version"),
            (route, {"vectors": []}, 422, "invalid_vectors"),
            (f"{route}?metric=hamming", {"vectors": queries.tolist()}, 422, "invalid_request"),
            (f"{route}?exact=perhaps", {"vectors": queries.tolist()}, 422, "invalid_request"),
        ]
        for url, content, status, code in refusals:
            refused = http.post(url, json=content)
            assert (refused.status_code, refused.json()["error"]["code"]) == (status, code), url
        assert "l2" in http.post(refusals[0][0], json=refusals[0][1]).json()["error"]["message"]


#: Client batch sizes: one row, sizes that do not divide the 30 queries, exactly 30, and the default (one batch).
BATCH_SIZES = [1, 7, 13, 30, 1024]


@pytest.mark.parametrize("batch_size", BATCH_SIZES)
def test_the_client_in_batches_gives_the_python_api_s_answer(
    service_registry: ServiceRegistry, batch_size: int
) -> None:
    artifact = Registry(service_registry.path).read_version(PROFILES, "live").artifact
    queries = np.random.default_rng(3).normal(size=(30, 384)).astype(np.float32)
    live = search_vectors(artifact, queries)
    # Each batch shape takes its own BLAS path, so batches agree with the whole to float32 round-off only.
    vectors_bound, offsets_bound = search_vectors_bound(artifact, queries)
    with (
        TestClient(app_for(service_registry.path)) as http,
        VeilClient(http_client=http, batch_size=batch_size) as veil,
    ):
        batched = veil.search_vectors(PROFILES, queries, exact=True)
        assert (batched.version, batched.exact) == (service_registry.leace, True)
        assert batched.vectors.shape == live.vectors.shape
        assert_same_answer(batched.vectors, live.vectors, vectors_bound, "vectors")
        assert_same_answer(batched.offsets, live.offsets, offsets_bound, "offsets")
        with pytest.raises(VeilClientError) as raised:
            veil.search_vectors(PROFILES, queries, metric="cosine", exact=True)
        assert raised.value.code == "inexact_search"


def _in_batches(artifact: MapArtifact, queries: NDArray[np.float32], size: int) -> tuple[NDArray[np.floating], ...]:
    parts = [search_vectors(artifact, queries[start : start + size]) for start in range(0, len(queries), size)]
    cleaned = np.concatenate([artifact.apply(queries[start : start + size]) for start in range(0, len(queries), size)])
    vectors = np.concatenate([part.vectors for part in parts])
    offsets = np.concatenate([part.offsets for part in parts if part.offsets is not None])
    return cleaned, vectors, offsets


@pytest.mark.parametrize("size", [1, 7, 13, 64])
def test_batched_and_whole_answers_agree_to_the_float32_round_off_bound(fitted: MapArtifact, size: int) -> None:
    queries = np.random.default_rng(5).normal(size=(64, 384)).astype(np.float32)
    whole = search_vectors(fitted, queries)
    vectors_bound, offsets_bound = search_vectors_bound(fitted, queries)
    cleaned_bound = apply_bound(fitted, queries)
    cleaned, vectors, offsets = _in_batches(fitted, queries, size)
    # Against the float64 evaluation each float32 answer lies within its own bound (the error analysis holds);
    # against each other, within twice it (whatever order BLAS summed in).
    assert_within(whole.vectors, vectors_bound.value, vectors_bound.error, "whole vs float64")
    assert_within(vectors, vectors_bound.value, vectors_bound.error, "batched vs float64")
    assert_same_answer(cleaned, fitted.apply(queries), cleaned_bound, "cleaned")
    assert_same_answer(vectors, whole.vectors, vectors_bound, "vectors")
    assert_same_answer(offsets, whole.offsets, offsets_bound, "offsets")
    # The bound is not loose enough to hide a real difference: per row it stays below 1e-3 of the vector it
    # bounds (about (d + k) u ‖·‖ with d = 384), and a planted change of twice the tolerance in one value of
    # one row is caught.
    for bound in (cleaned_bound, vectors_bound):
        share = np.linalg.norm(bound.error, axis=1) / np.linalg.norm(bound.value, axis=1)
        assert share.max() < 1e-3
    planted = vectors.astype(np.float64)
    planted[3, 17] += 4 * vectors_bound.error[3, 17]
    with pytest.raises(AssertionError, match=r"at \(3, 17\)"):
        assert_same_answer(planted, whole.vectors, vectors_bound, "planted")
