"""``veil serve`` as a real uvicorn process on loopback: same answers as in process, alias polling, clean logs."""

from __future__ import annotations

import asyncio
import io
import json
import os
import shutil
import socket
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import numpy as np
import pytest
import uvicorn
from uvicorn.protocols.http.h11_impl import H11Protocol
from uvicorn.protocols.http.httptools_impl import HttpToolsProtocol
from uvicorn.server import ServerState

from reliability.server import live_server, wait_until
from veil.cli import main
from veil.registry import Registry
from veil.samples.harbourline import load_harbourline_profiles
from veil.server import run
from veil.server.protocol import NoDelayH11Protocol, NoDelayHttpToolsProtocol

from .service_fixtures import ADMIN_TOKEN, PROFILES, ServiceRegistry
from .tolerances import apply_bound, assert_same_answer

NPY = "application/x-npy"


@pytest.fixture(params=[1, 2], ids=["one-worker", "two-workers"])
def server(
    request: pytest.FixtureRequest, service_registry: ServiceRegistry, tmp_path: Path
) -> Iterator[tuple[str, Path, Path]]:
    registry = tmp_path / "registry"
    shutil.copytree(service_registry.path, registry)
    log = tmp_path / "server.log"
    environment = {"VEIL_POLL_SECONDS": "0.5", "VEIL_ADMIN_TOKEN": ADMIN_TOKEN}
    with live_server(registry, names=[PROFILES], log=log, workers=request.param, environment=environment) as live:
        yield live.base_url, registry, log


def test_a_real_server_answers_like_the_in_process_eraser(
    server: tuple[str, Path, Path], service_registry: ServiceRegistry
) -> None:
    base, registry, log = server
    batch = load_harbourline_profiles().embedding[:128]
    artifact = Registry(registry).read_version(PROFILES, "live").artifact
    # The server caps BLAS at one thread, this process does not: equal to the float32 round-off bound only.
    expected, bound = artifact.apply(batch), apply_bound(artifact, batch)
    buffer = io.BytesIO()
    np.save(buffer, batch)
    with httpx.Client(base_url=base, timeout=30.0) as client:
        binary = client.post(
            f"/v1/erasers/{PROFILES}/apply", content=buffer.getvalue(), headers={"Content-Type": "application/x-npy"}
        )
        assert binary.status_code == 200
        assert_same_answer(np.load(io.BytesIO(binary.content)), expected, bound, "npy")
        as_json = client.post(f"/v1/erasers/{PROFILES}/apply", json={"vectors": batch.tolist()})
        # JSON carries each float32 as its shortest decimal: read back as float32 it is the served value exactly.
        assert_same_answer(np.array(as_json.json()["vectors"], dtype=np.float32), expected, bound, "json")

        # A promote reaches the running server (every worker) through alias polling, no request failing meanwhile.
        Registry(registry).promote(PROFILES, service_registry.meanproj)

        def switched() -> bool:
            response = client.post(f"/v1/erasers/{PROFILES}/apply", json={"vectors": batch[:2].tolist()})
            assert response.status_code == 200
            return response.headers["x-veil-version"] == service_registry.meanproj

        assert wait_until(switched, 15.0)

        def every_worker_serves(version: str) -> bool:
            # A new connection each time, so the kernel spreads them over the workers; the first worker to poll
            # may answer before the others have, so the check waits for all of them rather than the first.
            answers = {
                httpx.post(
                    f"{base}/v1/erasers/{PROFILES}/apply", json={"vectors": batch[:2].tolist()}, timeout=30.0
                ).headers["x-veil-version"]
                for _ in range(20)
            }
            return answers == {version}

        assert wait_until(lambda: every_worker_serves(service_registry.meanproj), 15.0)
        # And a rollback, the same way, within the polling interval on every worker.
        Registry(registry).rollback(PROFILES)
        assert wait_until(lambda: every_worker_serves(service_registry.leace), 15.0)
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


async def no_app(scope: object, receive: object, send: object) -> None:
    """The connections are checked before any request reaches an app."""


@pytest.mark.parametrize(
    ("protocol", "nodelay"),
    [(H11Protocol, False), (NoDelayH11Protocol, True), (HttpToolsProtocol, False), (NoDelayHttpToolsProtocol, True)],
)
def test_connections_on_the_multi_worker_socket_get_tcp_nodelay(
    protocol: type[asyncio.Protocol], nodelay: bool
) -> None:
    # The socket uvicorn binds for --workers > 1 is made with a family only (protocol 0), and asyncio then leaves
    # Nagle's algorithm on: uvicorn's own protocols show it (the controls), ours turn it off.
    async def accept_one() -> bool:
        listener = socket.socket(family=socket.AF_INET)
        listener.bind(("127.0.0.1", 0))
        config = uvicorn.Config(app=no_app)
        config.load()
        seen: list[bool] = []

        class Recording(protocol):  # type: ignore[valid-type, misc]
            def connection_made(self, transport: asyncio.Transport) -> None:  # type: ignore[override]
                super().connection_made(transport)
                option = transport.get_extra_info("socket").getsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY)
                seen.append(bool(option))

        loop = asyncio.get_running_loop()
        server = await loop.create_server(
            lambda: Recording(config=config, server_state=ServerState(), app_state={}), sock=listener
        )
        _, writer = await asyncio.open_connection(*listener.getsockname())
        for _ in range(100):
            if seen:
                break
            await asyncio.sleep(0.01)
        writer.close()
        server.close()
        return seen[0]

    assert asyncio.run(accept_one()) is nodelay


@pytest.mark.parametrize("kind", ["missing", "a file", "unreadable"])
def test_serve_names_an_unusable_registry_once_in_the_log_and_in_readyz(kind: str, tmp_path: Path) -> None:
    registry = tmp_path / "registry"
    launcher: list[str] = []
    if kind == "a file":
        registry.write_text("not a registry")
    elif kind == "unreadable":
        registry.mkdir()
        registry.chmod(0)
        if os.geteuid() == 0:
            # Root reads anything: without these two capabilities the mode bits hold for it too.
            setpriv = shutil.which("setpriv")
            if setpriv is None:
                pytest.skip("reading as root without permission override needs setpriv (util-linux)")
            launcher = [setpriv, "--bounding-set=-dac_override,-dac_read_search"]
    log = tmp_path / "server.log"
    try:
        with live_server(
            registry, names=[], log=log, expect_ready=False, launcher=launcher,
            environment={"VEIL_POLL_SECONDS": "0.2"},
        ) as live:  # fmt: skip
            # A few polls go by: the problem is logged when found, not again on each poll.
            time.sleep(1.0)
            ready = httpx.get(f"{live.base_url}/readyz", timeout=10.0)
    finally:
        if kind == "unreadable":
            registry.chmod(0o700)  # so that pytest can remove it
    lines = [json.loads(line) for line in log.read_text().splitlines() if line.startswith("{")]
    problems = [line for line in lines if line["event"] == "registry unusable"]
    assert len(problems) == 1, problems
    reason = {"missing": "does not exist", "a file": "is not a directory", "unreadable": "Permission denied"}[kind]
    assert problems[0]["registry"] == str(registry)
    assert problems[0]["problem"].startswith(f"the registry {registry} ")
    assert reason in problems[0]["problem"]
    assert ready.status_code == 503
    assert ready.json()["error"] == {"code": "not_ready", "message": problems[0]["problem"]}


@pytest.mark.parametrize("http", ["httptools", "h11"])
def test_both_http_stacks_serve_the_same_answers(http: str, service_registry: ServiceRegistry, tmp_path: Path) -> None:
    batch = load_harbourline_profiles().embedding[:16]
    artifact = Registry(service_registry.path).read_version(PROFILES, "live").artifact
    # The server caps BLAS at one thread, this process does not: equal to the float32 round-off bound only.
    expected, bound = artifact.apply(batch), apply_bound(artifact, batch)
    buffer = io.BytesIO()
    np.save(buffer, batch)
    log = tmp_path / "server.log"
    with (
        live_server(service_registry.path, names=[PROFILES], log=log, http=http) as live,
        httpx.Client(base_url=live.base_url, timeout=30.0) as client,
    ):
        binary = client.post(f"/v1/erasers/{PROFILES}/apply", content=buffer.getvalue(), headers={"Content-Type": NPY})
        as_json = client.post(f"/v1/erasers/{PROFILES}/apply", json={"vectors": batch.tolist()})
        refused = client.post(f"/v1/erasers/{PROFILES}/apply", content=b"[", headers={"Content-Type": "text/csv"})
    assert binary.status_code == 200
    assert_same_answer(np.load(io.BytesIO(binary.content)), expected, bound, "npy")
    assert_same_answer(np.array(as_json.json()["vectors"], dtype=np.float32), expected, bound, "json")
    assert refused.status_code == 415
    assert refused.json()["error"]["code"] == "unsupported_media_type"


@pytest.mark.parametrize(
    ("arguments", "protocol", "loop"),
    [
        ((), "veil.server.protocol:NoDelayHttpToolsProtocol", "uvloop"),
        (("--http", "httptools"), "veil.server.protocol:NoDelayHttpToolsProtocol", "uvloop"),
        (("--http", "h11"), "veil.server.protocol:NoDelayH11Protocol", "asyncio"),
    ],
)
def test_serve_runs_httptools_on_uvloop_unless_told_h11(
    arguments: tuple[str, ...], protocol: str, loop: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    calls: list[dict[str, object]] = []
    monkeypatch.setattr(run.uvicorn, "run", lambda app, **options: calls.append(options))
    # serve_forever writes VEIL_... variables for its workers: set here first, monkeypatch removes them after.
    for variable in ("VEIL_REGISTRY", "VEIL_ALIAS"):
        monkeypatch.setenv(variable, "")
    assert main(["serve", "--registry", str(tmp_path), "--workers", "2", *arguments]) == 0
    (options,) = calls
    assert (options["http"], options["loop"], options["workers"]) == (protocol, loop, 2)


def test_serve_refuses_an_unknown_http_stack(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    with pytest.raises(SystemExit) as exit_:
        main(["serve", "--registry", str(tmp_path), "--http", "zttp"])
    assert exit_.value.code == 2
    assert "invalid choice: 'zttp'" in capsys.readouterr().err
