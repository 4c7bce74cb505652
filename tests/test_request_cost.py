"""What a request costs the service, kept cheap without changing an answer: the apply hot path, the queued
reservoir, the cached ``.npy`` headers, plain-count metrics and direct request log lines.

Speed itself is measured by ``make bench`` (B2), never asserted here.
"""

from __future__ import annotations

import io
import logging
from typing import Any

import fastapi.routing
import numpy as np
import pytest
from prometheus_client.parser import text_string_to_metric_families
from scipy import stats

from veil.samples.harbourline import load_harbourline_profiles
from veil.server.codecs import npy_bytes, parse_npy
from veil.server.errors import ServiceError
from veil.server.hotpath import ApplyHotPath
from veil.server.reservoir import Reservoir, ReservoirBank

from .service_fixtures import PROFILES, ServiceRegistry, app_for, client_for

pytestmark = pytest.mark.anyio
NPY = "application/x-npy"
APPLY = f"/v1/erasers/{PROFILES}/apply"


def npy(matrix: np.ndarray) -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, matrix)
    return buffer.getvalue()


@pytest.fixture(scope="module")
def batch() -> np.ndarray:
    return load_harbourline_profiles().embedding[:8]


async def test_apply_is_served_past_fastapis_dependency_solving(
    service_registry: ServiceRegistry, batch: np.ndarray, monkeypatch: pytest.MonkeyPatch
) -> None:
    solved: list[str] = []
    original = fastapi.routing.solve_dependencies

    async def counting(*args: Any, **kwargs: Any) -> Any:
        solved.append(kwargs["request"].url.path)
        return await original(*args, **kwargs)

    monkeypatch.setattr(fastapi.routing, "solve_dependencies", counting)
    async with client_for(app_for(service_registry.path)) as client:
        answer = await client.post(APPLY, content=npy(batch), headers={"Content-Type": NPY})
        assert answer.status_code == 200
        assert (await client.post(APPLY, content=b"[", headers={"Content-Type": NPY})).status_code == 400
        assert solved == []
        # The control: every other route still goes through FastAPI's dependency solving.
        assert (await client.get(f"/v1/erasers/{PROFILES}")).status_code == 200
        assert solved == [f"/v1/erasers/{PROFILES}"]


def _requests(batch: np.ndarray, leace: str, token: str | None) -> list[tuple[str, str, dict[str, str], bytes]]:
    """Requests to the apply route and its neighbours: answers, refusals, and paths the hot path must leave."""
    body = npy(batch)
    nan = batch.copy()
    nan[1, 2] = np.nan
    as_json = {"Content-Type": "application/json"}
    requests = [
        ("POST", APPLY, {"Content-Type": NPY}, body),
        ("POST", APPLY, {"Content-Type": NPY, "Accept": "application/json"}, body),
        ("POST", APPLY, as_json, b'{"vectors": [[1.5, 2.0]]}'),
        ("POST", APPLY, as_json, b'{"vectors": "no"}'),
        ("POST", APPLY, {"Content-Type": NPY, "X-Veil-Version": leace}, body),
        ("POST", f"{APPLY}?version={leace}", {"Content-Type": NPY}, body),
        ("POST", f"{APPLY}?version=1&alias=live", {"Content-Type": NPY}, body),
        ("POST", f"{APPLY}?alias=nowhere", {"Content-Type": NPY}, body),
        ("POST", APPLY, {"Content-Type": NPY, "Accept": "text/html"}, body),
        ("POST", APPLY, {"Content-Type": "text/csv"}, body),
        ("POST", APPLY, {"Content-Type": NPY}, body[:-4]),
        ("POST", APPLY, {"Content-Type": NPY}, npy(nan)),
        ("POST", APPLY, {"Content-Type": NPY}, npy(batch[:, :10])),
        ("POST", "/v1/erasers/nobody/apply", {"Content-Type": NPY}, body),
        ("POST", f"{APPLY}/", {"Content-Type": NPY}, body),
        ("POST", "/v1/erasers//apply", {"Content-Type": NPY}, body),
        ("GET", APPLY, {}, b""),
        ("PUT", APPLY, {"Content-Type": NPY}, body),
    ]
    if token is None:
        return requests
    signed = [
        (method, path, {**headers, "Authorization": f"Bearer {token}"}, b) for method, path, headers, b in requests
    ]
    return [
        *signed,
        ("POST", APPLY, {"Content-Type": NPY, "Authorization": "Bearer wrong"}, body),
        ("POST", APPLY, {"Content-Type": NPY}, body),
    ]


def _without_hot_path(app: fastapi.FastAPI) -> fastapi.FastAPI:
    # The middleware stack is built on the first request, so the hot path can still be left out here.
    app.user_middleware = [entry for entry in app.user_middleware if entry.cls is not ApplyHotPath]
    return app


@pytest.mark.parametrize("data_token", [None, "s3cret"])
async def test_the_hot_path_answers_exactly_as_the_route_through_fastapi(
    service_registry: ServiceRegistry, batch: np.ndarray, data_token: str | None
) -> None:
    answers: list[list[tuple[int, str | None, str | None, bytes]]] = []
    for make in (app_for, lambda path, **settings: _without_hot_path(app_for(path, **settings))):
        async with client_for(make(service_registry.path, data_token=data_token)) as client:
            seen = []
            for method, path, headers, body in _requests(batch, service_registry.leace, data_token):
                response = await client.request(method, path, headers=headers, content=body)
                seen.append(
                    (
                        response.status_code,
                        response.headers.get("content-type"),
                        response.headers.get("x-veil-version"),
                        response.content,
                    )
                )
            metrics = (await client.get("/metrics")).text
            seen.append((0, None, None, _request_counts(metrics).encode()))
            answers.append(seen)
    with_hot_path, through_fastapi = answers
    assert with_hot_path == through_fastapi
    # Not vacuous: the table holds answers and refusals of many kinds.
    assert len({status for status, *_ in with_hot_path}) >= 5


def _request_counts(metrics: str) -> str:
    """The request counter's samples, as text (the latency histogram's values differ from run to run)."""
    families = {family.name: family for family in text_string_to_metric_families(metrics)}
    return repr(sorted((sorted(s.labels.items()), s.value) for s in families["veil_requests"].samples))


async def test_request_metrics_parse_as_prometheus_counters_and_histograms(
    service_registry: ServiceRegistry, batch: np.ndarray
) -> None:
    async with client_for(app_for(service_registry.path)) as client:
        for _ in range(3):
            await client.post(APPLY, content=npy(batch), headers={"Content-Type": NPY})
        await client.post(APPLY, content=b"no", headers={"Content-Type": NPY})
        await client.get("/nowhere")
        metrics = (await client.get("/metrics")).text
    # Reference: prometheus_client's own parser of the text exposition format.
    families = {family.name: family for family in text_string_to_metric_families(metrics)}
    assert families["veil_requests"].type == "counter"
    counts = {
        (s.labels["route"], s.labels["method"], s.labels["status"]): s.value
        for s in families["veil_requests"].samples
        if s.name == "veil_requests_total"
    }
    assert counts == {
        ("/v1/erasers/{name}/apply", "POST", "200"): 3,
        ("/v1/erasers/{name}/apply", "POST", "400"): 1,
        ("(unmatched)", "GET", "404"): 1,
    }
    latency = families["veil_request_seconds"]
    assert latency.type == "histogram"
    buckets = [
        (float(s.labels["le"]), s.value)
        for s in latency.samples
        if s.name == "veil_request_seconds_bucket" and s.labels["route"] == "/v1/erasers/{name}/apply"
    ]
    assert [bound for bound, _ in buckets] == sorted(bound for bound, _ in buckets)
    assert [value for _, value in buckets] == sorted(value for _, value in buckets)
    assert buckets[-1] == (float("inf"), 4)
    (count,) = (s.value for s in latency.samples if s.name == "veil_request_seconds_count" and "apply" in str(s))
    assert count == 4


def test_batches_folded_together_are_sampled_as_one_stream() -> None:
    rng = np.random.default_rng(0)
    batches = [rng.normal(size=(int(rng.integers(1, 60)), 4)).astype(np.float32) for _ in range(40)]
    together, stacked = Reservoir(50, 4, seed=3), Reservoir(50, 4, seed=3)
    together.add_many(batches[:20])
    together.add_many(batches[20:])
    stacked.add(np.concatenate(batches[:20]))
    stacked.add(np.concatenate(batches[20:]))
    assert together.seen == stacked.seen == sum(b.shape[0] for b in batches)
    np.testing.assert_array_equal(together.sample(), stacked.sample())


def test_the_bank_queues_batches_and_samples_them_uniformly_when_read() -> None:
    # One vector per request, as search traffic sends them: each of N rows should be kept with probability k/N,
    # so over many seeds the kept indices are uniform on [0, N).  Reference: scipy's chi-square test.
    capacity, total, bins = 100, 3000, 10
    counts = np.zeros(bins)
    for seed in range(30):
        bank = ReservoirBank(capacity, seed=seed)
        rng = np.random.default_rng(seed)
        start = 0
        while start < total:
            size = min(1 if rng.random() < 0.8 else int(rng.integers(2, 300)), total - start)
            bank.add("a", np.arange(start, start + size, dtype=np.float32)[:, None])
            start += size
            # Never more than a reservoir's worth of rows waits, plus the batch that brought it there.
            assert sum(batch.shape[0] for batch in bank._pending.get("a", [])) < capacity + size
        reservoir = bank.get("a")
        assert reservoir is not None
        assert reservoir.seen == total
        kept = reservoir.sample()[:, 0]
        assert np.unique(kept).size == capacity
        counts += np.histogram(kept, bins=bins, range=(0, total))[0]
    assert stats.chisquare(counts).pvalue > 0.001


def test_a_new_dimension_starts_a_new_reservoir_after_the_old_traffic() -> None:
    bank = ReservoirBank(10)
    bank.add("a", np.ones((3, 2), dtype=np.float32))
    bank.add("a", np.zeros((2, 5), dtype=np.float32))
    reservoir = bank.get("a")
    assert reservoir is not None
    assert (reservoir.dim, reservoir.seen) == (5, 2)
    assert bank.get("nobody") is None


@pytest.mark.parametrize("dtype", [np.float32, np.float64, np.dtype(">f4")])
@pytest.mark.parametrize("shape", [(1, 768), (256, 768), (3, 5)])
def test_npy_answers_are_byte_for_byte_what_numpy_saves(dtype: Any, shape: tuple[int, int]) -> None:
    matrix = np.random.default_rng(0).normal(size=shape).astype(dtype)
    # Reference: numpy's own writer.
    assert npy_bytes(matrix) == npy(matrix)
    assert npy_bytes(matrix[:, ::-1]) == npy(np.ascontiguousarray(matrix[:, ::-1]))


def test_a_refused_npy_header_is_refused_every_time() -> None:
    body = npy(np.ones((2, 3), dtype=np.float32)).replace(b"'fortran_order': False", b"'fortran_order': 0    ")
    for _ in range(2):
        with pytest.raises(ServiceError, match="fortran_order must be True or False"):
            parse_npy(body)
    np.testing.assert_array_equal(parse_npy(npy(np.ones((2, 3), dtype=np.float32))), np.ones((2, 3)))


async def test_request_lines_reach_other_handlers_as_records(
    service_registry: ServiceRegistry, batch: np.ndarray, caplog: pytest.LogCaptureFixture
) -> None:
    server_log = logging.getLogger("veil.server")
    server_log.addHandler(caplog.handler)  # the service's logger does not propagate to the root's
    try:
        async with client_for(app_for(service_registry.path)) as client:
            await client.post(APPLY, content=npy(batch), headers={"Content-Type": NPY})
    finally:
        server_log.removeHandler(caplog.handler)
    requests = [getattr(r, "fields", {}) for r in caplog.records if r.getMessage() == "request"]
    assert requests == [
        {
            "method": "POST",
            "route": "/v1/erasers/{name}/apply",
            "status": 200,
            "ms": requests[0]["ms"],
            "eraser": PROFILES,
            "version": service_registry.leace,
        }
    ]
