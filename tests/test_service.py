"""The HTTP service through httpx's ASGITransport: apply, pinning, counterfactuals, listing, health, admin, hot swap."""

from __future__ import annotations

import asyncio
import io
import logging
import shutil
import threading
from pathlib import Path

import numpy as np
import orjson
import pytest

from veil.registry import Registry
from veil.samples.harbourline import load_harbourline_profiles

from .service_fixtures import ADMIN_TOKEN, PLANTED, PROFILES, ServiceRegistry, app_for, client_for
from .test_cli import snapshot
from .test_registry import version_files
from .tolerances import apply_bound, assert_same_answer, counterfactual_bound

pytestmark = pytest.mark.anyio
NPY = "application/x-npy"


def npy(matrix: np.ndarray) -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, matrix)
    return buffer.getvalue()


def from_npy(body: bytes) -> np.ndarray:
    return np.load(io.BytesIO(body), allow_pickle=False)


@pytest.fixture(scope="module")
def batch() -> np.ndarray:
    return load_harbourline_profiles().embedding[:64]


@pytest.fixture
def copied(service_registry: ServiceRegistry, tmp_path: Path) -> Path:
    """A private copy of the shared registry, for tests that promote or damage versions."""
    shutil.copytree(service_registry.path, tmp_path / "registry")
    return tmp_path / "registry"


async def test_apply_in_both_formats_equals_the_in_process_transform(
    service_registry: ServiceRegistry, batch: np.ndarray
) -> None:
    artifact = Registry(service_registry.path).read_version(PROFILES, "live").artifact
    expected = artifact.apply(batch)
    # The service caps BLAS at one thread: it sums in another order than this process, so the answers agree to
    # the float32 round-off bound (tests/tolerances.py), not bit for bit.
    bound = apply_bound(artifact, batch)
    async with client_for(app_for(service_registry.path)) as client:
        binary = await client.post(f"/v1/erasers/{PROFILES}/apply", content=npy(batch), headers={"Content-Type": NPY})
        assert binary.status_code == 200
        assert binary.headers["content-type"] == NPY
        assert binary.headers["x-veil-version"] == service_registry.leace
        result = from_npy(binary.content)
        assert result.dtype == np.float32
        assert_same_answer(result, expected, bound, "npy")

        as_json = await client.post(f"/v1/erasers/{PROFILES}/apply", json={"vectors": batch.tolist()})
        assert as_json.status_code == 200
        content = orjson.loads(as_json.content)
        assert content["version"] == service_registry.leace
        # JSON carries each float32 as its shortest decimal: read back as float32 it is the served value exactly.
        assert_same_answer(np.array(content["vectors"], dtype=np.float32), expected, bound, "json")

        # Accept picks the response format: JSON in, .npy out; float64 and float16 in work too.
        mixed = await client.post(
            f"/v1/erasers/{PROFILES}/apply", json={"vectors": batch.tolist()}, headers={"Accept": NPY}
        )
        assert_same_answer(from_npy(mixed.content), expected, bound, "json in, npy out")
        wide = await client.post(
            f"/v1/erasers/{PROFILES}/apply", content=npy(batch.astype(np.float64)), headers={"Content-Type": NPY}
        )
        assert from_npy(wide.content).dtype == np.float64
        half = await client.post(
            f"/v1/erasers/{PROFILES}/apply", content=npy(batch.astype(np.float16)), headers={"Content-Type": NPY}
        )
        assert half.status_code == 200


async def test_fortran_order_and_big_endian_bodies_are_answered_like_c_order_float32(
    service_registry: ServiceRegistry, batch: np.ndarray
) -> None:
    x = np.asarray(batch, dtype=np.float32)
    artifact = Registry(service_registry.path).read_version(PROFILES, "live").artifact
    expected = artifact.apply(x)
    url = f"/v1/erasers/{PROFILES}/apply"
    async with client_for(app_for(service_registry.path)) as client:

        async def answer(matrix: np.ndarray) -> np.ndarray:
            response = await client.post(url, content=npy(matrix), headers={"Content-Type": NPY})
            assert response.status_code == 200, response.text
            return from_npy(response.content)

        plain = await answer(x)
        # numpy's own writer marks these in the header: fortran_order True, and descr '>f4' / '>f8'.
        for variant in (np.asfortranarray(x), x.astype(">f4"), np.asfortranarray(x.astype(">f4"))):
            got = await answer(variant)
            assert got.dtype == np.dtype("<f4")
            np.testing.assert_array_equal(got, plain)
        # Bodies of one shape take one path in the service, bit for bit; this process sums in another order.
        assert_same_answer(plain, expected, apply_bound(artifact, x), "against this process")
        wide = x.astype(np.float64)
        np.testing.assert_array_equal(await answer(wide.astype(">f8")), await answer(wide))
        np.testing.assert_array_equal(await answer(np.asfortranarray(wide)), await answer(wide))
        # The drift route reads bodies the same way.
        drift = f"/v1/erasers/{PROFILES}/drift"
        reports = [
            (await client.post(drift, content=npy(m), headers={"Content-Type": NPY})).json()
            for m in (x, np.asfortranarray(x.astype(">f4")))
        ]
        assert reports[0] == reports[1]


async def test_callers_can_pin_a_version_or_another_alias(
    service_registry: ServiceRegistry, copied: Path, batch: np.ndarray
) -> None:
    Registry(copied).promote(PROFILES, service_registry.meanproj, alias="canary")
    pinned = Registry(copied).read_version(PROFILES, service_registry.meanproj).artifact
    meanproj, bound = pinned.apply(batch), apply_bound(pinned, batch)
    url = f"/v1/erasers/{PROFILES}/apply"
    async with client_for(app_for(copied)) as client:
        for request in (
            {"params": {"version": "2"}},
            {"params": {"version": service_registry.meanproj}},
            {"headers": {"X-Veil-Version": "v2"}},
            {"params": {"alias": "canary"}},
            {"headers": {"X-Veil-Alias": "canary"}},
        ):
            headers = {"Content-Type": NPY, **request.get("headers", {})}
            response = await client.post(url, content=npy(batch), headers=headers, params=request.get("params"))
            assert response.status_code == 200, response.text
            assert response.headers["x-veil-version"] == service_registry.meanproj
            assert_same_answer(from_npy(response.content), meanproj, bound, str(request))
        # The default is still the live alias.
        live = await client.post(url, content=npy(batch), headers={"Content-Type": NPY})
        assert live.headers["x-veil-version"] == service_registry.leace


async def test_counterfactual_adds_the_target_class_component(
    service_registry: ServiceRegistry, batch: np.ndarray
) -> None:
    artifact = Registry(service_registry.path).read_version(PROFILES, "live").artifact
    index = list(artifact.classes).index("she")
    # x_cf = x' + U Vᵀ (μ_she − μ), from the stored map's own factors.
    expected = artifact.apply(batch) + artifact.map.shift_towards(artifact.class_means[index])
    # Both computations are within the counterfactual's float32 round-off bound of the exact value.
    bound = counterfactual_bound(artifact, batch, artifact.class_means[index])
    async with client_for(app_for(service_registry.path)) as client:
        response = await client.post(
            f"/v1/erasers/{PROFILES}/counterfactual", json={"vectors": batch.tolist(), "target": "she"}
        )
        assert response.status_code == 200
        served = np.array(orjson.loads(response.content)["vectors"], dtype=np.float32)
        assert_same_answer(served, expected, bound, "json")
        binary = await client.post(
            f"/v1/erasers/{PROFILES}/counterfactual",
            content=npy(batch),
            params={"target": "she"},
            headers={"Content-Type": NPY},
        )
        assert_same_answer(from_npy(binary.content), expected, bound, "npy")


async def test_listing_health_readiness_and_metrics(service_registry: ServiceRegistry, batch: np.ndarray) -> None:
    before = snapshot(service_registry.path)
    async with client_for(app_for(service_registry.path)) as client:
        listing = (await client.get("/v1/erasers")).json()
        assert {(e["name"], e["version"]) for e in listing["erasers"]} == {
            (PLANTED, service_registry.planted),
            (PROFILES, service_registry.leace),
        }
        shown = (await client.get(f"/v1/erasers/{PROFILES}")).json()
        assert shown["card"]["method"] == "leace"
        assert shown["classes"] == ["he", "she"]
        assert (await client.get("/healthz")).json() == {"status": "alive"}
        ready = await client.get("/readyz")
        assert ready.status_code == 200
        assert ready.json()["erasers"][PROFILES] == service_registry.leace
        await client.post(f"/v1/erasers/{PROFILES}/apply", content=npy(batch), headers={"Content-Type": NPY})
        metrics = (await client.get("/metrics")).text
        assert f'veil_version_info{{alias="live",name="{PROFILES}",version="{service_registry.leace}"}} 1.0' in metrics
        assert f'veil_vectors_total{{name="{PROFILES}",version="{service_registry.leace}"}} 64.0' in metrics
        assert 'veil_requests_total{method="POST",route="/v1/erasers/{name}/apply",status="200"} 1.0' in metrics
        assert "veil_request_seconds_bucket" in metrics
        schema = (await client.get("/openapi.json")).json()
        assert "/v1/erasers/{name}/apply" in schema["paths"]
        await client.post("/v1/admin/reload", headers={"Authorization": f"Bearer {ADMIN_TOKEN}"})
    # Stateless: serving, reloading and checking never write to the registry.
    assert snapshot(service_registry.path) == before


async def test_only_configured_names_are_served(service_registry: ServiceRegistry) -> None:
    async with client_for(app_for(service_registry.path, names=[PLANTED])) as client:
        assert [e["name"] for e in (await client.get("/v1/erasers")).json()["erasers"]] == [PLANTED]
        response = await client.get(f"/v1/erasers/{PROFILES}")
        assert response.status_code == 404
        assert response.json()["error"]["code"] == "unknown_eraser"


async def test_readiness_names_the_registry_problem_until_the_registry_is_there(
    service_registry: ServiceRegistry, tmp_path: Path, caplog: pytest.LogCaptureFixture
) -> None:
    registry = tmp_path / "registry"
    auth = {"Authorization": f"Bearer {ADMIN_TOKEN}"}
    server_log = logging.getLogger("veil.server")
    server_log.addHandler(caplog.handler)  # the service's logger does not propagate to the root's
    try:
        async with client_for(app_for(registry)) as client:
            missing = await client.get("/readyz")
            assert missing.status_code == 503
            assert missing.json()["error"]["message"] == f"the registry {registry} does not exist"
            await client.post("/v1/admin/reload", headers=auth)  # unchanged: not logged again
            registry.mkdir()
            await client.post("/v1/admin/reload", headers=auth)
            empty = await client.get("/readyz")
            assert empty.json()["error"]["message"] == f"the registry {registry} holds no eraser"
            shutil.copytree(service_registry.path, registry, dirs_exist_ok=True)
            await client.post("/v1/admin/reload", headers=auth)
            assert (await client.get("/readyz")).status_code == 200
    finally:
        server_log.removeHandler(caplog.handler)
    events = [(r.getMessage(), getattr(r, "fields", {}).get("problem")) for r in caplog.records]
    assert [event for event in events if event[0].startswith("registry")] == [
        ("registry unusable", f"the registry {registry} does not exist"),
        ("registry unusable", f"the registry {registry} holds no eraser"),
        ("registry readable", None),
    ]


async def test_admin_routes_need_the_right_token(service_registry: ServiceRegistry) -> None:
    async with client_for(app_for(service_registry.path, admin_token=None)) as client:
        response = await client.post("/v1/admin/reload", headers={"Authorization": f"Bearer {ADMIN_TOKEN}"})
        assert response.status_code == 403
        assert response.json()["error"]["code"] == "admin_disabled"
    async with client_for(app_for(service_registry.path)) as client:
        missing = await client.post("/v1/admin/reload")
        assert (missing.status_code, missing.json()["error"]["code"]) == (401, "unauthorized")
        wrong = await client.post("/v1/admin/reload", headers={"Authorization": "Bearer nope"})
        assert (wrong.status_code, wrong.json()["error"]["code"]) == (403, "forbidden")
        basic = await client.post("/v1/admin/reload", headers={"Authorization": f"Basic {ADMIN_TOKEN}"})
        assert basic.status_code == 403
        right = await client.post("/v1/admin/reload", headers={"Authorization": f"Bearer {ADMIN_TOKEN}"})
        assert right.status_code == 200
        assert right.json()["serving"][PROFILES] == service_registry.leace


async def test_data_routes_can_require_a_token(service_registry: ServiceRegistry, batch: np.ndarray) -> None:
    async with client_for(app_for(service_registry.path, data_token="data-token")) as client:
        url = f"/v1/erasers/{PROFILES}/apply"
        refused = await client.post(url, content=npy(batch), headers={"Content-Type": NPY})
        assert refused.status_code == 401
        allowed = await client.post(
            url, content=npy(batch), headers={"Content-Type": NPY, "Authorization": "Bearer data-token"}
        )
        assert allowed.status_code == 200
        assert (await client.get("/healthz")).status_code == 200


async def test_reload_swaps_in_a_promoted_version_and_refuses_bad_ones(
    service_registry: ServiceRegistry, copied: Path, batch: np.ndarray
) -> None:
    registry = Registry(copied)
    auth = {"Authorization": f"Bearer {ADMIN_TOKEN}"}
    url = f"/v1/erasers/{PROFILES}/apply"
    async with client_for(app_for(copied)) as client:
        registry.promote(PROFILES, service_registry.meanproj)
        reloaded = (await client.post("/v1/admin/reload", headers=auth)).json()
        assert reloaded["loaded"] == [f"{PROFILES} {service_registry.meanproj}"]
        response = await client.post(url, content=npy(batch), headers={"Content-Type": NPY})
        assert response.headers["x-veil-version"] == service_registry.meanproj

        # A version of another dimension, promoted with the flag, is still refused by a running service.
        other = registry.add_version(PROFILES, version_files(1, d=6))
        registry.promote(PROFILES, other, allow_dimension_change=True)
        refused = (await client.post("/v1/admin/reload", headers=auth)).json()
        assert "dimension 6" in refused["failed"][PROFILES]
        # A damaged version reached through a hand-edited alias is refused too.
        registry.rollback(PROFILES, allow_dimension_change=True)
        arrays = copied / PROFILES / "versions" / service_registry.leace / "arrays.npz"
        data = bytearray(arrays.read_bytes())
        data[len(data) // 2] ^= 0x01
        arrays.write_bytes(bytes(data))
        alias_file = copied / PROFILES / "aliases" / "live.json"
        state = orjson.loads(alias_file.read_bytes())
        alias_file.write_bytes(orjson.dumps({**state, "version": service_registry.leace}))
        damaged = (await client.post("/v1/admin/reload", headers=auth)).json()
        assert "does not match its sha256" in damaged["failed"][PROFILES]
        # Through all of it the last good version kept serving, and the service says so truthfully.
        still = await client.post(url, content=npy(batch), headers={"Content-Type": NPY})
        assert still.status_code == 200
        assert still.headers["x-veil-version"] == service_registry.meanproj
        ready = (await client.get("/readyz")).json()
        assert ready["erasers"][PROFILES] == service_registry.meanproj
        assert PROFILES in ready["last_failures"]
        metrics = (await client.get("/metrics")).text
        assert f'veil_reload_failures_total{{name="{PROFILES}"}} 2.0' in metrics


async def test_rollback_under_concurrent_requests_never_fails_or_mixes_versions(
    service_registry: ServiceRegistry, copied: Path, batch: np.ndarray
) -> None:
    registry = Registry(copied)
    artifacts = {
        version: registry.read_version(PROFILES, version).artifact
        for version in (service_registry.leace, service_registry.meanproj)
    }
    expected = {version: artifact.apply(batch) for version, artifact in artifacts.items()}
    bounds = {version: apply_bound(artifact, batch) for version, artifact in artifacts.items()}
    app = app_for(copied)
    url = f"/v1/erasers/{PROFILES}/apply"
    stop = threading.Event()

    def flip_versions() -> None:
        # Promote and roll back as fast as the registry allows, reloading the replica after each move.
        while not stop.is_set():
            registry.promote(PROFILES, service_registry.meanproj)
            app.state.catalog.reload()
            registry.rollback(PROFILES)
            app.state.catalog.reload()

    async with client_for(app) as client:

        async def caller(count: int) -> list[tuple[int, str, np.ndarray]]:
            results = []
            for _ in range(count):
                response = await client.post(url, content=npy(batch), headers={"Content-Type": NPY})
                results.append(
                    (response.status_code, response.headers.get("x-veil-version", ""), from_npy(response.content))
                )
                await asyncio.sleep(0)
            return results

        flipper = threading.Thread(target=flip_versions)
        flipper.start()
        try:
            batches = await asyncio.gather(*(caller(40) for _ in range(8)))
        finally:
            stop.set()
            flipper.join()
    responses = [r for group in batches for r in group]
    assert len(responses) == 320
    assert all(status == 200 for status, _, _ in responses)
    seen = {version for _, version, _ in responses}
    assert seen == set(expected), "the test must see both versions served"
    for _, version, output in responses:
        assert_same_answer(output, expected[version], bounds[version], version)
    moves = [e for e in registry.history(PROFILES) if e.event > 1]
    assert len(moves) >= 2
