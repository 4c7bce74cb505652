"""``veil serve`` as a real uvicorn process on loopback: same answers as in process, alias polling, clean logs."""

from __future__ import annotations

import io
import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import numpy as np
import pytest

from veil.datasets import load_harbourline_profiles
from veil.registry import Registry

from .service_fixtures import ADMIN_TOKEN, PROFILES, ServiceRegistry

STARTUP_SECONDS = 60.0


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def wait_until(predicate, timeout: float) -> bool:  # type: ignore[no-untyped-def]
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if predicate():
            return True
        time.sleep(0.1)
    return False


@pytest.fixture(params=[1, 2], ids=["one-worker", "two-workers"])
def server(
    request: pytest.FixtureRequest, service_registry: ServiceRegistry, tmp_path: Path
) -> Iterator[tuple[str, Path, Path]]:
    registry = tmp_path / "registry"
    shutil.copytree(service_registry.path, registry)
    port = free_port()
    log = tmp_path / "server.log"
    environment = {**os.environ, "VEIL_POLL_SECONDS": "0.5", "VEIL_ADMIN_TOKEN": ADMIN_TOKEN}
    command = [
        sys.executable,
        "-m",
        "veil.cli",
        "serve",
        "--registry",
        str(registry),
        "--port",
        str(port),
        "--name",
        PROFILES,
    ]
    with log.open("wb") as sink:
        process = subprocess.Popen(command, stdout=sink, stderr=subprocess.STDOUT, env=environment)
    base = f"http://127.0.0.1:{port}"

    def ready() -> bool:
        try:
            return httpx.get(f"{base}/readyz", timeout=1.0).status_code == 200
        except httpx.TransportError:
            return False

    try:
        assert wait_until(ready, STARTUP_SECONDS), log.read_text()
        yield base, registry, log
    finally:
        process.send_signal(signal.SIGTERM)
        try:
            process.wait(timeout=20)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait()


def test_a_real_server_answers_like_the_in_process_eraser(
    server: tuple[str, Path, Path], service_registry: ServiceRegistry
) -> None:
    base, registry, log = server
    batch = load_harbourline_profiles().embedding[:128]
    expected = Registry(registry).read_version(PROFILES, "live").artifact.apply(batch)
    buffer = io.BytesIO()
    np.save(buffer, batch)
    with httpx.Client(base_url=base, timeout=30.0) as client:
        binary = client.post(
            f"/v1/erasers/{PROFILES}/apply", content=buffer.getvalue(), headers={"Content-Type": "application/x-npy"}
        )
        assert binary.status_code == 200
        np.testing.assert_allclose(np.load(io.BytesIO(binary.content)), expected, atol=1e-6)
        as_json = client.post(f"/v1/erasers/{PROFILES}/apply", json={"vectors": batch.tolist()})
        np.testing.assert_allclose(np.array(as_json.json()["vectors"]), expected, atol=1e-6)

        # A promote reaches the running server (every worker) through alias polling, no request failing meanwhile.
        Registry(registry).promote(PROFILES, service_registry.meanproj)

        def switched() -> bool:
            response = client.post(f"/v1/erasers/{PROFILES}/apply", json={"vectors": batch[:2].tolist()})
            assert response.status_code == 200
            return response.headers["x-veil-version"] == service_registry.meanproj

        assert wait_until(switched, 15.0)
        # A new connection each time, so the kernel spreads them over the workers: all answer with the new version.
        for _ in range(20):
            fresh = httpx.post(
                f"{base}/v1/erasers/{PROFILES}/apply", json={"vectors": batch[:2].tolist()}, timeout=30.0
            )
            assert fresh.headers["x-veil-version"] == service_registry.meanproj
        # And a rollback, the same way, within the polling interval on every worker.
        Registry(registry).rollback(PROFILES)

        def rolled_back() -> bool:
            answers = {
                httpx.post(
                    f"{base}/v1/erasers/{PROFILES}/apply", json={"vectors": batch[:2].tolist()}, timeout=30.0
                ).headers["x-veil-version"]
                for _ in range(10)
            }
            return answers == {service_registry.leace}

        assert wait_until(rolled_back, 15.0)
        Registry(registry).promote(PROFILES, service_registry.meanproj)
        assert wait_until(switched, 15.0)
        reload = client.post("/v1/admin/reload", headers={"Authorization": f"Bearer {ADMIN_TOKEN}"})
        assert reload.json()["serving"][PROFILES] == service_registry.meanproj
        assert "veil_reloads_total" in client.get("/metrics").text
    time.sleep(0.5)
    lines = log.read_text().splitlines()
    requests = [json.loads(line) for line in lines if line.startswith("{") and '"event":"request"' in line]
    assert any(r["route"] == "/v1/erasers/{name}/apply" and r["status"] == 200 for r in requests)
    assert all("vectors" not in r for r in requests)
    # Neither the admin token nor any payload value is ever logged.
    text = log.read_text()
    assert ADMIN_TOKEN not in text
    assert f"{batch[0, 0]:.6f}"[:8] not in text
