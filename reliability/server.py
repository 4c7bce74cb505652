"""``veil serve`` as a real uvicorn process on a free loopback port, for the checks that need a live server."""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path

import httpx

STARTUP_SECONDS = 60.0


def free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


def wait_until(predicate: Callable[[], bool], timeout: float, interval: float = 0.1) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if predicate():
            return True
        time.sleep(interval)
    return False


@dataclass(frozen=True)
class LiveServer:
    base_url: str
    log: Path
    process: subprocess.Popen[bytes]

    def alive(self) -> bool:
        return self.process.poll() is None

    def status(self, path: str) -> int:
        """The status of a GET, or 0 when nothing answers."""
        try:
            return httpx.get(f"{self.base_url}{path}", timeout=5.0).status_code
        except httpx.TransportError:
            return 0


@contextmanager
def live_server(
    registry: Path,
    *,
    names: list[str],
    log: Path,
    workers: int = 1,
    environment: dict[str, str] | None = None,
    expect_ready: bool = True,
    launcher: Sequence[str] = (),
    http: str | None = None,
) -> Iterator[LiveServer]:
    """Start ``veil serve`` on loopback, wait until ``/readyz`` (or ``/healthz``) answers 200, stop it after.

    ``launcher`` goes before the command, e.g. to run the server with fewer privileges than the caller;
    ``http`` picks ``veil serve --http`` (its default if None).
    """
    port = free_port()
    command = [
        *launcher, sys.executable, "-m", "veil.cli", "serve", "--registry", str(registry), "--host", "127.0.0.1",
        "--port", str(port), "--workers", str(workers),
    ]  # fmt: skip
    for name in names:
        command += ["--name", name]
    if http is not None:
        command += ["--http", http]
    with log.open("wb") as sink:
        process = subprocess.Popen(
            command, stdout=sink, stderr=subprocess.STDOUT, env={**os.environ, **(environment or {})}
        )
    server = LiveServer(f"http://127.0.0.1:{port}", log, process)
    probe = "/readyz" if expect_ready else "/healthz"
    try:
        if not wait_until(lambda: server.status(probe) == 200 or not server.alive(), STARTUP_SECONDS):
            raise RuntimeError(f"veil serve did not answer {probe} within {STARTUP_SECONDS:.0f} s:\n{log.read_text()}")
        if not server.alive():
            raise RuntimeError(f"veil serve exited at start:\n{log.read_text()}")
        yield server
    finally:
        process.send_signal(signal.SIGTERM)
        try:
            process.wait(timeout=20)
        except subprocess.TimeoutExpired:
            process.kill()
            process.wait()
