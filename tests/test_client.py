"""The client library: retries, errors and batching on httpx's MockTransport; results against the real app."""

from __future__ import annotations

import io
import json
import random

import httpx
import numpy as np
import pytest
from fastapi.testclient import TestClient

from veil.registry import Registry
from veil.samples.harbourline import load_harbourline_profiles
from veil_client import (
    AsyncVeilClient,
    VeilClient,
    VeilClientError,
    VeilServerError,
    VeilTransportError,
    VeilValidationError,
)
from veil_client._base import RetryPolicy

from .service_fixtures import ADMIN_TOKEN, PLANTED, PROFILES, ServiceRegistry, app_for, client_for, planted_population
from .tolerances import apply_bound, assert_same_answer

VERSION = "v0007-0123456789ab"


def npy_response(matrix: np.ndarray, version: str = VERSION) -> httpx.Response:
    buffer = io.BytesIO()
    np.save(buffer, matrix)
    return httpx.Response(
        200,
        content=buffer.getvalue(),
        headers={"Content-Type": "application/x-npy", "X-Veil-Version": version, "X-Veil-Eraser": "e"},
    )


def doubled(request: httpx.Request) -> httpx.Response:
    """A stand-in service: returns 2x, in the requested format."""
    if request.headers["content-type"] == "application/json":
        matrix = np.array(json.loads(request.content)["vectors"], dtype=np.float32)
        return httpx.Response(
            200, json={"version": VERSION, "vectors": (2 * matrix).tolist()}, headers={"X-Veil-Version": VERSION}
        )
    return npy_response(2 * np.load(io.BytesIO(request.content)))


def error(status: int, code: str) -> httpx.Response:
    return httpx.Response(status, json={"error": {"code": code, "message": f"{code} happened"}})


class Script:
    """A MockTransport handler that plays a list of outcomes, then answers like :func:`doubled`."""

    def __init__(self, *outcomes: httpx.Response | Exception) -> None:
        self.outcomes = list(outcomes)
        self.requests: list[httpx.Request] = []

    def __call__(self, request: httpx.Request) -> httpx.Response:
        self.requests.append(request)
        if self.outcomes:
            outcome = self.outcomes.pop(0)
            if isinstance(outcome, Exception):
                raise outcome
            return outcome
        return doubled(request)


def client(script: Script, **options: object) -> VeilClient:
    return VeilClient("http://veil.test", transport=httpx.MockTransport(script), backoff=0.0, **options)  # type: ignore[arg-type]


X = np.arange(30 * 4, dtype=np.float32).reshape(30, 4)


def test_connection_errors_and_503_are_retried_then_succeed() -> None:
    script = Script(httpx.ConnectError("refused"), error(503, "not_ready"), httpx.ReadTimeout("slow"))
    result = client(script).apply("e", X)
    assert len(script.requests) == 4
    np.testing.assert_array_equal(result.vectors, 2 * X)
    assert result.version == VERSION


def test_retries_run_out_with_a_clear_error() -> None:
    refusing = Script(*[httpx.ConnectError("refused")] * 10)
    with pytest.raises(VeilTransportError, match="ConnectError"):
        client(refusing, retries=2).apply("e", X)
    assert len(refusing.requests) == 3
    busy = Script(*[error(503, "version_unavailable")] * 10)
    with pytest.raises(VeilServerError) as raised:
        client(busy, retries=2).apply("e", X)
    assert (raised.value.status, raised.value.code) == (503, "version_unavailable")
    assert len(busy.requests) == 3


@pytest.mark.parametrize(
    ("status", "code", "kind"),
    [
        (422, "wrong_dimension", VeilClientError),
        (404, "unknown_eraser", VeilClientError),
        (500, "internal_error", VeilServerError),
    ],
)
def test_other_errors_are_never_retried_and_carry_the_service_code(status: int, code: str, kind: type) -> None:
    script = Script(error(status, code))
    with pytest.raises(kind) as raised:
        client(script).apply("e", X)
    assert len(script.requests) == 1
    assert raised.value.code == code
    assert raised.value.message == f"{code} happened"
    assert raised.value.status == status


def test_large_inputs_are_batched_in_order_and_pinned_to_the_first_version() -> None:
    script = Script()
    result = client(script, batch_size=7).apply("e", X, alias="canary")
    assert [int(r.headers["content-length"]) > 0 for r in script.requests] == [True] * 5
    sizes = [np.load(io.BytesIO(r.content)).shape[0] for r in script.requests]
    assert sizes == [7, 7, 7, 7, 2]
    np.testing.assert_array_equal(result.vectors, 2 * X)
    assert script.requests[0].headers["x-veil-alias"] == "canary"
    assert all(r.headers["x-veil-version"] == VERSION for r in script.requests[1:])
    assert all("x-veil-alias" not in r.headers for r in script.requests[1:])


def test_json_encoding_tokens_and_counterfactual_targets() -> None:
    script = Script()
    result = client(script, encoding="json", token="t0k").counterfactual("e", X[:3], "she")
    request = script.requests[0]
    assert request.headers["content-type"] == "application/json"
    assert request.headers["authorization"] == "Bearer t0k"
    assert request.url.params["target"] == "she"
    np.testing.assert_allclose(result.vectors, 2 * X[:3])


@pytest.mark.parametrize(
    ("vectors", "message"),
    [
        (np.ones((2, 2, 2)), "2-D"),
        (np.ones((0, 4)), "empty"),
        (np.array([[1.0, np.nan]]), "NaN"),
        (np.array([["a", "b"]]), "numbers"),
        ([[1.0, 2.0], [3.0]], "2-D array of numbers"),
    ],
)
def test_bad_vectors_are_refused_before_any_request(vectors: object, message: str) -> None:
    script = Script()
    with pytest.raises(VeilValidationError, match=message):
        client(script).apply("e", vectors)  # type: ignore[arg-type]
    assert script.requests == []


def test_one_1d_vector_is_sent_as_one_row_and_answered_as_a_1d_vector() -> None:
    script = Script()
    cleaned = client(script).apply("e", X[0])
    assert len(script.requests) == 1
    assert cleaned.vectors.shape == X[0].shape
    np.testing.assert_allclose(cleaned.vectors, client(Script()).apply("e", X[:1]).vectors[0])


def test_bad_options_and_drift_arguments_are_refused_before_any_request() -> None:
    script = Script()
    with pytest.raises(VeilValidationError, match="not both"):
        client(script).apply("e", X, version="1", alias="live")
    with pytest.raises(VeilValidationError, match="3 labels for 30"):
        client(script).drift("e", X, labels=["a", "b", "c"])
    with pytest.raises(VeilValidationError, match="batch_size"):
        client(script, batch_size=0)
    with pytest.raises(VeilValidationError, match="format"):
        client(script, encoding="xml")
    assert script.requests == []


def test_drift_sends_the_pinned_version_or_alias_on_both_routes() -> None:
    script = Script(*(httpx.Response(200, json={"status": "ok"}) for _ in range(4)))
    veil = client(script)
    veil.drift("e", X, version="3")
    veil.drift("e", X, labels=["a"] * 30, alias="canary")
    veil.drift("e", version="v0003-0123456789ab")
    veil.drift("e", alias="canary")
    assert [(r.method, r.headers.get("x-veil-version"), r.headers.get("x-veil-alias")) for r in script.requests] == [
        ("POST", "3", None),
        ("POST", None, "canary"),
        ("GET", "v0003-0123456789ab", None),
        ("GET", None, "canary"),
    ]
    with pytest.raises(VeilValidationError, match="not both"):
        veil.drift("e", version="3", alias="canary")
    assert len(script.requests) == 4


def test_backoff_grows_exponentially_with_jitter_up_to_the_cap() -> None:
    policy = RetryPolicy(retries=8, base=0.1, cap=1.0)
    rng = random.Random(0)
    for attempt in range(8):
        ceiling = min(1.0, 0.1 * 2**attempt)
        delays = [policy.delay(attempt, rng) for _ in range(50)]
        assert all(0.5 * ceiling <= d <= ceiling for d in delays)
        assert len(set(delays)) > 1  # jittered


@pytest.mark.anyio
async def test_the_async_client_retries_and_batches_alike() -> None:
    script = Script(httpx.ConnectError("refused"), error(503, "not_ready"))

    async def handler(request: httpx.Request) -> httpx.Response:
        return script(request)

    async with AsyncVeilClient(
        "http://veil.test", transport=httpx.MockTransport(handler), backoff=0.0, batch_size=8
    ) as veil:
        result = await veil.apply("e", X)
        with pytest.raises(VeilValidationError):
            await veil.apply("e", np.ones((2, 2, 2)))
    np.testing.assert_array_equal(result.vectors, 2 * X)
    assert len(script.requests) == 2 + 4


@pytest.mark.anyio
async def test_the_async_client_on_the_real_app_equals_the_in_process_transform(
    service_registry: ServiceRegistry,
) -> None:
    x, z = planted_population(3000, seed=7)
    artifact = Registry(service_registry.path).read_version(PLANTED, "live").artifact
    expected = artifact.apply(x)
    # Each batch shape, and the service's single BLAS thread, sum in their own order: the client's answer equals
    # the whole batch's to the float32 round-off bound (tests/tolerances.py), not bit for bit.
    bound = apply_bound(artifact, x)
    async with client_for(app_for(service_registry.path)) as http:
        for encoding in ("npy", "json"):
            veil = AsyncVeilClient(http_client=http, batch_size=500, token=ADMIN_TOKEN, encoding=encoding)
            result = await veil.apply(PLANTED, x)
            assert result.version == service_registry.planted
            assert_same_answer(result.vectors, expected, bound, encoding)
        report = await veil.drift(PLANTED, x[:1000], labels=list(z[:1000]))
        assert report["status"] == "ok"
        # Pinned to the version the live alias names, on the posted sample and on the traffic just cleaned.
        pinned = await veil.drift(PLANTED, x[:1000], alias="live", version=None)
        assert pinned["version"] == service_registry.planted
        traffic = await veil.drift(PLANTED, version=service_registry.planted)
        assert (traffic["version"], traffic["traffic_seen"]) == (service_registry.planted, 6000)
        assert (await veil.reload())["serving"][PLANTED] == service_registry.planted
        with pytest.raises(VeilClientError) as raised:
            await veil.apply(PLANTED, np.ones((2, 5)))
        assert raised.value.code == "wrong_dimension"


@pytest.mark.parametrize("batch_size", [1, 7, 64, 257, 1024])
@pytest.mark.parametrize("encoding", ["npy", "json"])
def test_the_sync_client_in_any_batch_size_equals_the_in_process_transform(
    service_registry: ServiceRegistry, batch_size: int, encoding: str
) -> None:
    # 257 rows: batches of one row, of sizes that leave a short last batch, and one batch of all (the default).
    x, _ = planted_population(257, seed=8)
    artifact = Registry(service_registry.path).read_version(PLANTED, "live").artifact
    expected = artifact.apply(x)
    with (
        TestClient(app_for(service_registry.path)) as http,
        VeilClient(http_client=http, batch_size=batch_size, encoding=encoding) as veil,
    ):
        result = veil.apply(PLANTED, x)
    assert result.vectors.dtype == np.float32
    assert_same_answer(result.vectors, expected, apply_bound(artifact, x), f"batches of {batch_size}")


def test_the_sync_client_on_the_real_app(service_registry: ServiceRegistry) -> None:
    batch = np.asarray(
        Registry(service_registry.path).read_version(PROFILES, "live").artifact.map.mean[None, :].repeat(3, axis=0),
        dtype=np.float32,
    )
    pinned_artifact = Registry(service_registry.path).read_version(PROFILES, "2").artifact
    expected = pinned_artifact.apply(batch)
    with TestClient(app_for(service_registry.path)) as http, VeilClient(http_client=http) as veil:
        assert {e["name"] for e in veil.erasers()} == {PLANTED, PROFILES}
        assert veil.eraser(PROFILES)["card"]["method"] == "leace"
        assert veil.ready()["status"] == "ready"
        pinned = veil.apply(PROFILES, batch, version="2")
        assert pinned.version == service_registry.meanproj
        # The service's single BLAS thread sums in its own order: equal to the float32 round-off bound.
        assert_same_answer(pinned.vectors, expected, apply_bound(pinned_artifact, batch), "pinned")
        # Drift checks pin the same way: the live version by default, the pinned one when asked.
        sample = load_harbourline_profiles().embedding[:200]
        assert veil.drift(PROFILES, sample)["version"] == service_registry.leace
        assert veil.drift(PROFILES, sample, version="2")["version"] == service_registry.meanproj
        veil.apply(PROFILES, sample)
        traffic = veil.drift(PROFILES, version="2")
        assert (traffic["version"], traffic["rows"]) == (service_registry.meanproj, 201)
        with pytest.raises(VeilClientError) as raised:
            veil.apply("nobody", batch)
        assert raised.value.code == "unknown_eraser"
