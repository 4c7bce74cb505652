"""Drift and leakage checks: quiet traffic is ok; shifted or leaking traffic alerts, with and without labels."""

from __future__ import annotations

import io

import numpy as np
import orjson
import pytest
from scipy import stats

from veil.registry import Registry
from veil.server.reservoir import Reservoir

from .service_fixtures import PLANTED, ServiceRegistry, app_for, client_for, planted_population

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
