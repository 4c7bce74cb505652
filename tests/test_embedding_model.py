"""The embedding model a version was fitted on: recorded on its card, shown, and checked against what callers state.

A map fitted on one model's space moves another model's vectors to meaningless places even at the same
dimension, so a caller stating another model (``X-Veil-Embedding-Model``) is refused, naming both; no
statement, or a version that records no model (fitted without one, or written by an older release), is
accepted as before.  The older release's registry is the committed fixture ``tests/fixtures/registry_0_1``.
"""

from __future__ import annotations

import io
import json
import shutil
from pathlib import Path
from typing import Any

import httpx
import jsonschema
import numpy as np
import pytest
from numpy.typing import NDArray
from starlette.testclient import TestClient

from veil.errors import DataError
from veil.fitting.job import fit_version
from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, StoreSpec
from veil.registry import Registry
from veil.samples.embedding_model import EmbeddingModel
from veil_client import AsyncVeilClient, VeilClient, VeilClientError, VeilEmbeddingModelError, VeilValidationError

from .service_fixtures import app_for, client_for, planted_population, sample_of
from .test_cli import run
from .test_evidence_schema import SCHEMA

NAME = "planted-model"
LEGACY = Path(__file__).parent / "fixtures" / "registry_0_1" / "registry"
MODEL = EmbeddingModel("acme/encoder", "2.1")
ROUTES = ("apply", "search-vector", "drift", "counterfactual")


@pytest.fixture(scope="module")
def registry_path(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """Version 1 (live) fitted on acme/encoder@2.1, version 2 fitted without a model, and the older release's
    ``legacy`` eraser (a copy: its committed files must never change)."""
    path = tmp_path_factory.mktemp("models") / "registry"
    shutil.copytree(LEGACY, path)
    x, z = planted_population(2000, seed=3)
    linear = AuditSpec(nonlinear=False)
    for store in (StoreSpec(NAME, alias="live", embedding_model=MODEL), StoreSpec(NAME)):
        request = FitRequest(MethodSpec("leace"), store, audit=linear)
        fit_version(sample_of(x, z, "region"), request, registry=Registry(path))
    return path


def _save(path: Path, **extra: Any) -> Path:
    x, z = planted_population(1500, seed=4)
    np.savez(path, embedding=x, region=z, **extra)
    return path


def _fit(registry: Path, data: Path, *options: str) -> Any:
    fitted = run(
        "fit", "--data", data, "--attribute", "region", "--method", "meanproj", "--name", "fitted",
        "--probes", "linear", "--registry", registry, *options,
    )  # fmt: skip
    return fitted


def test_fit_records_the_model_with_its_dimension_and_show_prints_it(tmp_path: Path) -> None:
    registry = tmp_path / "registry"
    fitted = _fit(registry, _save(tmp_path / "sample.npz"), "--embedding-model", "acme/encoder@2.1")
    assert fitted.code == 0, fitted.err
    card = Registry(registry).read_version("fitted", "1").card
    assert card["embedding_model"] == {"name": "acme/encoder", "version": "2.1", "dim": 16, "stated_by": "request"}
    assert card["request"]["store"]["embedding_model"] == "acme/encoder@2.1"
    shown = run("show", "fitted", "1", "--registry", registry)
    assert "embedding model" in shown.out
    assert "acme/encoder@2.1, dim 16; a caller stating another model (X-Veil-Embedding-Model) is refused" in shown.out
    # The evidence document stays valid against its schema, checked by the jsonschema reference validator.
    document = json.loads(run("show", "fitted", "1", "--registry", registry, "--json").out)
    jsonschema.Draft202012Validator(SCHEMA).validate(document)
    assert document["embedding_model"]["name"] == "acme/encoder"


def test_a_sample_file_stating_its_model_is_the_default_and_the_card_says_so(tmp_path: Path) -> None:
    registry = tmp_path / "registry"
    data = _save(tmp_path / "stated.npz", embedding_model=np.array("acme/encoder@2.1"))
    assert _fit(registry, data).code == 0
    card = Registry(registry).read_version("fitted", "1").card
    assert card["embedding_model"]["stated_by"] == "sample file"
    assert card["request"]["store"]["embedding_model"] is None
    shown = run("show", "fitted", "1", "--registry", registry).out
    assert "acme/encoder@2.1, dim 16, named by the sample file; a caller stating another model" in shown
    # The same model named on the command line agrees (without a version, any version of the name does).
    assert _fit(registry, data, "--embedding-model", "acme/encoder").code == 0
    refused = _fit(registry, data, "--embedding-model", "other/encoder@1")
    assert refused.code == 2
    assert "'acme/encoder@2.1'" in refused.err
    assert "'other/encoder@1'" in refused.err
    assert len(Registry(registry).versions("fitted")) == 2  # the refused fit stored nothing


def test_a_malformed_model_in_a_sample_file_is_refused(tmp_path: Path) -> None:
    data = _save(tmp_path / "bad.npz", embedding_model=np.array(["acme/encoder", "two"]))
    refused = _fit(tmp_path / "registry", data)
    assert refused.code == 2
    assert "'embedding_model' must be one string" in refused.err


def test_show_says_which_versions_accept_any_caller(registry_path: Path) -> None:
    fitted_without = run("show", NAME, "2", "--registry", registry_path).out
    assert "not recorded: the fit named none" in fitted_without
    assert "any caller's model is accepted, only the dimension (16) is checked" in fitted_without
    older = run("show", "legacy", "1", "--registry", registry_path).out
    assert "not recorded: stored before versions recorded their model" in older
    assert Registry(registry_path).read_version(NAME, "2").card["embedding_model"] is None


@pytest.mark.parametrize(
    "text", ["", "acme encoder", "acme/encoder@", "@2.1", "acme@2@1", "-acme", "acme/é", "a" * 201]
)
def test_bad_model_values_are_refused_naming_the_form(tmp_path: Path, text: str) -> None:
    with pytest.raises(DataError, match="NAME or NAME@VERSION"):
        EmbeddingModel.parse(text)
    refused = _fit(tmp_path / "registry", _save(tmp_path / "sample.npz"), f"--embedding-model={text}")
    assert refused.code == 2
    assert "--embedding-model: an embedding model is NAME or NAME@VERSION" in refused.err
    assert not (tmp_path / "registry" / "fitted").exists()
    with pytest.raises(VeilValidationError, match="embedding_model is NAME or NAME@VERSION"):
        VeilClient(embedding_model=text)


def test_the_request_takes_a_model_object_only() -> None:
    with pytest.raises(DataError, match=r"EmbeddingModel\.parse"):
        StoreSpec(NAME, embedding_model="acme/encoder")  # type: ignore[arg-type]


def test_models_compare_by_name_and_by_version_when_both_state_one() -> None:
    assert EmbeddingModel.parse(" acme/encoder@2.1 ") == MODEL
    assert not MODEL.differs_from(EmbeddingModel("acme/encoder"))
    assert MODEL.differs_from(EmbeddingModel("acme/encoder", "2.2"))
    assert MODEL.differs_from(EmbeddingModel("acme/Encoder", "2.1"))


def _vectors(rows: int = 5) -> NDArray[np.float32]:
    return planted_population(rows, seed=9)[0]


def _post(route: str, header: str | None) -> dict[str, Any]:
    """A JSON request to ``route`` stating ``header`` (None: no statement)."""
    body: dict[str, Any] = {"vectors": _vectors().tolist()}
    if route == "counterfactual":
        body["target"] = "north"
    if route == "drift":
        body = {"vectors": _vectors(300).tolist()}
    headers = {} if header is None else {"X-Veil-Embedding-Model": header}
    return {"content": json.dumps(body).encode(), "headers": {"Content-Type": "application/json", **headers}}


@pytest.mark.anyio
async def test_the_service_refuses_another_model_on_every_vector_route(registry_path: Path) -> None:
    async with client_for(app_for(registry_path)) as http:
        for route in ROUTES:
            for stated in ("other/encoder@2.1", "acme/encoder@2.2", "other/encoder"):
                answer = await http.post(f"/v1/erasers/{NAME}/{route}", **_post(route, stated))
                assert answer.status_code == 409, (route, stated, answer.text)
                error = answer.json()["error"]
                assert error["code"] == "embedding_model_mismatch"
                assert (error["stated"], error["recorded"]) == (stated, "acme/encoder@2.1")
                assert f"'{stated}'" in error["message"]
                assert "'acme/encoder@2.1'" in error["message"]


@pytest.mark.anyio
async def test_the_service_takes_the_same_model_no_statement_and_versions_without_a_model(registry_path: Path) -> None:
    async with client_for(app_for(registry_path)) as http:
        for route in ROUTES:
            for stated in (None, "", "acme/encoder", "acme/encoder@2.1"):
                answer = await http.post(f"/v1/erasers/{NAME}/{route}", **_post(route, stated))
                assert answer.status_code == 200, (route, stated, answer.text)
            # Version 2 records no model: any statement is accepted.
            pinned = await http.post(f"/v1/erasers/{NAME}/{route}?version=2", **_post(route, "other/encoder@9"))
            assert pinned.status_code == 200, (route, pinned.text)
        # The older release's version records none either (8 features, region with three classes).
        legacy = np.load(LEGACY.parent / "sample.npz")["embedding"][:5]
        answer = await http.post(
            "/v1/erasers/legacy/apply",
            json={"vectors": legacy.tolist()},
            headers={"X-Veil-Embedding-Model": "other/encoder@9"},
        )
        assert answer.status_code == 200, answer.text


@pytest.mark.anyio
async def test_the_service_refuses_a_malformed_statement(registry_path: Path) -> None:
    async with client_for(app_for(registry_path)) as http:
        for route in ROUTES:
            answer = await http.post(f"/v1/erasers/{NAME}/{route}", **_post(route, "acme encoder@2.1"))
            assert answer.status_code == 422, (route, answer.text)
            assert answer.json()["error"]["code"] == "invalid_request"
            assert "X-Veil-Embedding-Model: an embedding model is NAME or NAME@VERSION" in answer.text


def test_the_sync_client_states_its_model_and_raises_a_permanent_error(registry_path: Path) -> None:
    x = _vectors()
    # Not closed here: closing a client closes the http client it was given, which both share.
    with TestClient(app_for(registry_path)) as http:
        other = VeilClient(http_client=http, embedding_model="other/encoder@2.1")
        with pytest.raises(VeilEmbeddingModelError) as raised:
            other.apply(NAME, x)
        assert isinstance(raised.value, VeilClientError)
        assert (raised.value.stated, raised.value.recorded) == ("other/encoder@2.1", "acme/encoder@2.1")
        with pytest.raises(VeilEmbeddingModelError):
            other.search_vectors(NAME, x)
        assert other.apply(NAME, x, version="2").vectors.shape == x.shape
        same = VeilClient(http_client=http, embedding_model="acme/encoder@2.1")
        assert same.counterfactual(NAME, x, "north").vectors.shape == x.shape


@pytest.mark.anyio
async def test_the_async_client_states_its_model_and_raises_a_permanent_error(registry_path: Path) -> None:
    x = _vectors(300)
    async with client_for(app_for(registry_path)) as http:
        # Not closed here: closing a client closes the http client it was given, which both share.
        other = AsyncVeilClient(http_client=http, embedding_model="acme/encoder@2.2")
        with pytest.raises(VeilEmbeddingModelError) as raised:
            await other.drift(NAME, x)
        assert (raised.value.stated, raised.value.recorded) == ("acme/encoder@2.2", "acme/encoder@2.1")
        with pytest.raises(VeilEmbeddingModelError):
            await other.counterfactual(NAME, x, "north")
        same = AsyncVeilClient(http_client=http, embedding_model="acme/encoder")
        assert (await same.apply(NAME, x)).vectors.shape == x.shape


def test_the_client_sends_the_header_on_every_call_and_never_retries_the_refusal() -> None:
    seen: list[httpx.Request] = []

    def refuse(request: httpx.Request) -> httpx.Response:
        seen.append(request)
        error = {"code": "embedding_model_mismatch", "message": "fitted on b", "stated": "a@1", "recorded": "b"}
        return httpx.Response(409, json={"error": error})

    veil = VeilClient(transport=httpx.MockTransport(refuse), embedding_model="a@1", retries=3, backoff=0.0)
    with pytest.raises(VeilEmbeddingModelError):
        veil.apply(NAME, _vectors())
    with pytest.raises(VeilEmbeddingModelError):
        veil.drift(NAME)
    assert len(seen) == 2  # one request each: a 4xx is never retried
    assert [request.headers["X-Veil-Embedding-Model"] for request in seen] == ["a@1", "a@1"]
    buffer = io.BytesIO(seen[0].content)
    assert np.load(buffer).shape == (5, 16)
