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

K = 10
#: Scores of the two paths differ by float32 round-off (about 2e-7 here); results closer than this are a tie.
TIE = 1e-6


def flat_ip(vectors: NDArray[np.floating]) -> faiss.IndexFlatIP:
    index = faiss.IndexFlatIP(vectors.shape[1])
    index.add(np.ascontiguousarray(vectors, dtype=np.float32))
    return index


def assert_same_ranking(
    reference_scores: NDArray[np.floating], reference_ids: NDArray[np.int64], ids: NDArray[np.int64]
) -> None:
    """``ids`` ranks as the reference does, except that results tied within round-off may come in either order.

    The reference holds ``K + 5`` results per query, so a tie across the K-th place is seen whole.
    """
    for scores, expected, got in zip(reference_scores, reference_ids, ids, strict=True):
        group_of = np.concatenate([[0], np.cumsum(np.diff(-scores) > TIE)])
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
    reference_scores, reference_ids = flat_ip(fitted.apply(corpus)).search(fitted.apply(queries), K + 5)
    scores, ids = search_raw_index(flat_ip(corpus), fitted, queries, K, require_exact=True)
    assert_same_ranking(reference_scores, reference_ids, ids)
    # With the per-query offset ⟨r(q), b⟩ the raw index's scores are the cleaned index's.
    np.testing.assert_allclose(scores, reference_scores[:, :K], atol=1e-5)
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


def test_the_route_and_the_client_give_the_python_api_s_answer(service_registry: ServiceRegistry) -> None:
    registry = Registry(service_registry.path)
    queries = np.random.default_rng(3).normal(size=(30, 384)).astype(np.float32)
    route = f"/v1/erasers/{PROFILES}/search-vector"
    with TestClient(app_for(service_registry.path)) as http:
        live = search_vectors(registry.read_version(PROFILES, "live").artifact, queries)
        answer = http.post(route, json={"vectors": queries.tolist()})
        assert answer.status_code == 200
        assert (answer.headers["x-veil-version"], answer.headers["x-veil-search-exact"]) == (
            service_registry.leace, "true",
        )  # fmt: skip
        body = answer.json()
        np.testing.assert_allclose(np.array(body["vectors"]), live.vectors, atol=1e-6)
        np.testing.assert_allclose(np.array(body["offsets"]), live.offsets, atol=1e-6)
        assert (body["exact"], body["metric"], body["note"]) == (True, "inner_product", "")
        pinned = search_vectors(registry.read_version(PROFILES, "2").artifact, queries)
        npy = http.post(
            f"{route}?version=2&metric=cosine", content=_npy(queries), headers={"Content-Type": "application/x-npy"}
        )
        assert (npy.headers["x-veil-version"], npy.headers["x-veil-search-exact"]) == (
            service_registry.meanproj, "false",
        )  # fmt: skip
        np.testing.assert_allclose(np.load(io.BytesIO(npy.content)), pinned.vectors, atol=1e-6)

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

        with VeilClient(http_client=http, batch_size=7) as veil:
            batched = veil.search_vectors(PROFILES, queries, exact=True)
            assert (batched.version, batched.exact) == (service_registry.leace, True)
            np.testing.assert_allclose(batched.vectors, live.vectors, atol=1e-6)
            np.testing.assert_allclose(batched.offsets, live.offsets, atol=1e-6)
            with pytest.raises(VeilClientError) as raised:
                veil.search_vectors(PROFILES, queries, metric="cosine", exact=True)
            assert raised.value.code == "inexact_search"
