"""Drift and leakage checks: quiet traffic is ok; shifted or leaking traffic alerts, with and without labels."""

from __future__ import annotations

import io

import numpy as np
import orjson
import pytest
from scipy import stats

from veil.registry import Registry
from veil.samples.harbourline import load_harbourline_profiles
from veil.server.reservoir import Reservoir

from .service_fixtures import PLANTED, PROFILES, ServiceRegistry, app_for, client_for, planted_population

pytestmark = pytest.mark.anyio
DRIFT = f"/v1/erasers/{PLANTED}/drift"


def npy(matrix: np.ndarray) -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, matrix)
    return buffer.getvalue()


async def drift(client, x: np.ndarray, labels: np.ndarray | None) -> dict:  # type: ignore[no-untyped-def, type-arg]
    if labels is None:
        response = await client.post(DRIFT, content=npy(x), headers={"Content-Type": "application/x-npy"})
    else:
        response = await client.post(
            DRIFT,
            content=orjson.dumps({"vectors": x.tolist(), "labels": labels.tolist()}),
            headers={"Content-Type": "application/json"},
        )
    assert response.status_code == 200, response.text
    return response.json()  # type: ignore[no-any-return]


def leading_direction(service_registry: ServiceRegistry) -> tuple[np.ndarray, float]:
    reference = Registry(service_registry.path).read_version(PLANTED, "live").files["reference.npz"]
    with np.load(io.BytesIO(reference)) as stored:
        return stored["eigenvectors"][:, 0], float(stored["eigenvalues"][0])


@pytest.mark.parametrize("with_labels", [True, False])
async def test_traffic_from_the_fitting_population_is_ok(service_registry: ServiceRegistry, with_labels: bool) -> None:
    x, z = planted_population(2000, seed=2)
    async with client_for(app_for(service_registry.path)) as client:
        report = await drift(client, x, z if with_labels else None)
    assert report["status"] == "ok", report["reasons"]
    assert report["labels"] == ("labels" if with_labels else "pseudo-labels")
    assert report["mean_shift"] == 0.0
    assert 0.7 < report["erased_variance_ratio"] < 1.3
    assert report["prior_shift"] < 0.05
    # The erased sample is at the majority baseline, within its interval.
    leakage = report["leakage"]
    assert leakage["interval_low"] <= leakage["majority"] + 0.01


@pytest.mark.parametrize("with_labels", [True, False])
async def test_a_shifted_population_alerts_on_the_mean(service_registry: ServiceRegistry, with_labels: bool) -> None:
    x, z = planted_population(2000, seed=3)
    direction, variance = leading_direction(service_registry)
    # 1.5 standard deviations along the leading axis: 1.5 in whitened units.
    shifted = (x + 1.5 * np.sqrt(variance) * direction).astype(np.float32)
    async with client_for(app_for(service_registry.path)) as client:
        report = await drift(client, shifted, z if with_labels else None)
    assert report["status"] == "alert"
    assert report["mean_shift_raw"] == pytest.approx(1.5, abs=0.15)
    assert any(reason.startswith("mean_shift") for reason in report["reasons"])


@pytest.mark.parametrize("with_labels", [True, False])
async def test_a_sub_population_where_the_attribute_leaks_again_alerts(
    service_registry: ServiceRegistry, with_labels: bool
) -> None:
    x, z = planted_population(2000, seed=4)
    # A new sub-population carries the attribute along a direction the fit never saw.
    fresh = np.random.default_rng(5).normal(size=x.shape[1])
    leaking = (x + 1.5 * np.outer(np.where(z == "south", 1.0, -1.0), fresh / np.linalg.norm(fresh))).astype(np.float32)
    async with client_for(app_for(service_registry.path)) as client:
        report = await drift(client, leaking, z if with_labels else None)
    assert report["status"] == "alert"
    assert report["leakage"]["accuracy"] > report["leakage"]["majority"] + 0.2
    assert any(reason.startswith("leakage_gap") for reason in report["reasons"])


async def test_thresholds_can_be_overridden_in_settings(service_registry: ServiceRegistry) -> None:
    x, z = planted_population(2000, seed=3)
    direction, variance = leading_direction(service_registry)
    shifted = (x + 1.5 * np.sqrt(variance) * direction).astype(np.float32)
    overrides = {"mean_shift": {"warn": 5.0, "alert": 9.0}, "covariance_shift": {"warn": 5.0, "alert": 9.0}}
    async with client_for(app_for(service_registry.path, thresholds=overrides)) as client:
        report = await drift(client, shifted, z)
    assert report["status"] == "ok", report["reasons"]


async def test_recent_traffic_is_checked_from_the_reservoir(service_registry: ServiceRegistry) -> None:
    x, _ = planted_population(3000, seed=6)
    async with client_for(app_for(service_registry.path, reservoir_size=1000)) as client:
        for start in range(0, 3000, 250):
            response = await client.post(
                f"/v1/erasers/{PLANTED}/apply",
                content=npy(x[start : start + 250]),
                headers={"Content-Type": "application/x-npy"},
            )
            assert response.status_code == 200
        report = (await client.get(DRIFT)).json()
        assert report["rows"] == 1000
        assert report["traffic_seen"] == 3000
        assert report["labels"] == "pseudo-labels"
        assert report["status"] == "ok", report["reasons"]
        metrics = (await client.get("/metrics")).text
        assert f'veil_drift_status{{name="{PLANTED}"}} 0.0' in metrics


def test_the_reservoir_is_a_uniform_sample_of_the_stream() -> None:
    # Each of N streamed rows should be kept with probability k/N; over many seeds the kept
    # indices are uniform on [0, N).  Reference: scipy's chi-square goodness-of-fit test.
    capacity, total, bins = 200, 5000, 10
    counts = np.zeros(bins)
    for seed in range(40):
        reservoir = Reservoir(capacity, 1, seed=seed)
        rng = np.random.default_rng(seed)
        start = 0
        while start < total:
            size = min(int(rng.integers(1, 400)), total - start)
            reservoir.add(np.arange(start, start + size, dtype=np.float32)[:, None])
            start += size
        kept = reservoir.sample()[:, 0]
        assert kept.size == capacity
        assert np.unique(kept).size == capacity
        counts += np.histogram(kept, bins=bins, range=(0, total))[0]
    assert stats.chisquare(counts).pvalue > 0.001


async def test_repeated_queries_are_checked_once_each(service_registry: ServiceRegistry) -> None:
    # Search traffic repeats itself: the same 300 queries, sent six times over, are the same 300 vectors.
    queries = load_harbourline_profiles().embedding[:300]
    apply, drift = f"/v1/erasers/{PROFILES}/apply", f"/v1/erasers/{PROFILES}/drift"
    reports = []
    for rounds in (1, 6):
        async with client_for(app_for(service_registry.path)) as client:
            for _ in range(rounds):
                for start in range(0, 300, 50):
                    response = await client.post(
                        apply, content=npy(queries[start : start + 50]), headers={"Content-Type": "application/x-npy"}
                    )
                    assert response.status_code == 200
            reports.append((await client.get(drift)).json())
    once, six_times = reports
    assert once["status"] == "ok", once["reasons"]
    assert (once["traffic_seen"], six_times["traffic_seen"]) == (300, 1800)
    assert six_times["rows"] == 300
    # The same distinct vectors in the same order: the very same report.
    assert {**six_times, "traffic_seen": 300} == once


def test_the_reservoir_holds_each_vector_once_and_repeats_crowd_nothing_out() -> None:
    capacity = 100
    reservoir = Reservoir(capacity, 2, seed=0)
    rng = np.random.default_rng(0)
    popular = np.column_stack([np.arange(30), np.zeros(30)]).astype(np.float32)
    rare = np.column_stack([np.arange(1000, 3000), np.ones(2000)]).astype(np.float32)
    # The popular vectors come back in every batch, in float32 and float64 alike, among a stream of new ones.
    for start in range(0, 2000, 50):
        batch = np.concatenate([popular, rare[start : start + 50], popular.astype(np.float64)])
        reservoir.add(batch[rng.permutation(batch.shape[0])])
        held = reservoir.sample()
        assert np.unique(held, axis=0).shape[0] == held.shape[0]
    assert held.shape[0] == capacity
    assert reservoir.seen == 40 * 110
    # Held once, a popular vector takes one slot however often it comes: most slots hold the 2000 rare ones.
    assert (held[:, 1] == 1).sum() >= capacity - 30


def test_a_hash_match_alone_never_drops_a_distinct_vector() -> None:
    reservoir = Reservoir(10, 3, seed=0)
    first = np.array([[1.0, 2.0, 3.0]], dtype=np.float32)
    other = np.array([[4.0, 5.0, 6.0]], dtype=np.float32)
    reservoir.add(first)
    # Pretend the other vector's bytes hash like the first's (a 64-bit collision): it must still be kept.
    reservoir._slots[hash(other.tobytes())] = 0
    reservoir.add(other)
    reservoir.add(first)
    np.testing.assert_array_equal(reservoir.sample(), np.concatenate([first, other]))


async def test_a_pinned_version_is_checked_on_the_same_traffic_without_touching_the_served_gauge(
    service_registry: ServiceRegistry,
) -> None:
    queries = load_harbourline_profiles().embedding[:400]
    async with client_for(app_for(service_registry.path)) as client:
        response = await client.post(
            f"/v1/erasers/{PROFILES}/apply", content=npy(queries), headers={"Content-Type": "application/x-npy"}
        )
        assert response.headers["x-veil-version"] == service_registry.leace
        drift = f"/v1/erasers/{PROFILES}/drift"
        for request in ({"params": {"version": "2"}}, {"headers": {"X-Veil-Version": service_registry.meanproj}}):
            pinned = await client.get(drift, **request)  # type: ignore[arg-type]
            assert pinned.status_code == 200, pinned.text
            assert pinned.json()["version"] == service_registry.meanproj
            assert pinned.json()["rows"] == 400
        gauge = f'veil_drift_status{{name="{PROFILES}"}}'
        assert gauge not in (await client.get("/metrics")).text
        served = (await client.get(drift)).json()
        assert served["version"] == service_registry.leace
        assert gauge in (await client.get("/metrics")).text
        both = await client.get(drift, params={"version": "2", "alias": "live"})
        assert (both.status_code, both.json()["error"]["code"]) == (422, "invalid_request")
        unknown = await client.get(drift, params={"alias": "nightly"})
        assert (unknown.status_code, unknown.json()["error"]["code"]) == (404, "unknown_version")
