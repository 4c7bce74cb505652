"""What one replica does about erasers it cannot serve: not its alias, or a damaged version."""

from __future__ import annotations

import io
import logging
import shutil
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest

from veil.registry import Registry

from .service_fixtures import ADMIN_TOKEN, PLANTED, PROFILES, ServiceRegistry, app_for, client_for
from .test_registry import version_files

pytestmark = pytest.mark.anyio
AUTH = {"Authorization": f"Bearer {ADMIN_TOKEN}"}


@pytest.fixture
def copied(service_registry: ServiceRegistry, tmp_path: Path) -> Path:
    shutil.copytree(service_registry.path, tmp_path / "registry")
    return tmp_path / "registry"


@pytest.fixture
def server_log(caplog: pytest.LogCaptureFixture) -> Iterator[pytest.LogCaptureFixture]:
    logger = logging.getLogger("veil.server")
    logger.addHandler(caplog.handler)  # the service's logger does not propagate to the root's
    yield caplog
    logger.removeHandler(caplog.handler)


def npy(matrix: np.ndarray) -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, matrix)
    return buffer.getvalue()


async def test_an_eraser_without_the_served_alias_keeps_no_replica_from_being_ready(
    service_registry: ServiceRegistry, copied: Path, server_log: pytest.LogCaptureFixture
) -> None:
    Registry(copied).add_version("drafts", version_files(1))  # fitted, never pointed at by live
    async with client_for(app_for(copied)) as client:
        for _ in range(3):
            await client.post("/v1/admin/reload", headers=AUTH)
        ready = await client.get("/readyz")
        metrics = (await client.get("/metrics")).text
    assert ready.status_code == 200, ready.text
    assert set(ready.json()["erasers"]) == {PLANTED, PROFILES}
    assert 'veil_reload_failing{name="drafts"}' not in metrics
    assert not [record for record in server_log.records if record.getMessage() == "reload refused"]


async def test_a_damaged_live_version_answers_503_and_is_logged_once(
    service_registry: ServiceRegistry, copied: Path, server_log: pytest.LogCaptureFixture
) -> None:
    arrays = copied / PROFILES / "versions" / service_registry.leace / "arrays.npz"
    data = bytearray(arrays.read_bytes())
    data[len(data) // 2] ^= 0x01
    arrays.write_bytes(bytes(data))
    vectors = np.zeros((2, 384), dtype=np.float32)
    async with client_for(app_for(copied)) as client:
        for _ in range(3):
            await client.post("/v1/admin/reload", headers=AUTH)
        applied = await client.post(
            f"/v1/erasers/{PROFILES}/apply", content=npy(vectors), headers={"Content-Type": "application/x-npy"}
        )
        shown = await client.get(f"/v1/erasers/{PROFILES}")
        ready = await client.get("/readyz")
        other = await client.get(f"/v1/erasers/{PLANTED}")
    # Unavailable, not unknown: the client retries a 503 (a repair or rollback ends it) and gives up on a 404.
    for answer in (applied, shown):
        assert answer.status_code == 503, answer.text
        assert answer.json()["error"]["code"] == "version_unavailable"
        assert "does not match its sha256" in answer.json()["error"]["message"]
    assert ready.status_code == 503
    assert other.status_code == 200  # the other eraser is served all the same
    refused = [record for record in server_log.records if record.getMessage() == "reload refused"]
    assert len(refused) == 1  # at start-up; three reloads found the same problem and said nothing


async def test_an_eraser_whose_alias_is_removed_stops_being_served(copied: Path) -> None:
    async with client_for(app_for(copied)) as client:
        assert (await client.get(f"/v1/erasers/{PLANTED}")).status_code == 200
        Registry(copied).remove_alias(PLANTED, "live", reason="retired")
        await client.post("/v1/admin/reload", headers=AUTH)
        gone = await client.get(f"/v1/erasers/{PLANTED}")
        ready = await client.get("/readyz")
    assert gone.status_code == 404
    assert gone.json()["error"]["code"] == "unknown_eraser"
    assert ready.status_code == 200
    assert set(ready.json()["erasers"]) == {PROFILES}


async def test_a_configured_name_the_registry_lacks_is_unknown_not_unavailable(copied: Path) -> None:
    async with client_for(app_for(copied, names=[PROFILES, "no-such-eraser"])) as client:
        answer = await client.get("/v1/erasers/no-such-eraser")
        ready = await client.get("/readyz")
    assert answer.status_code == 404  # not retried by the client: a typo in the settings does not heal itself
    assert answer.json()["error"]["code"] == "unknown_eraser"
    assert ready.status_code == 503
