"""A bounded load generator: concurrent asyncio clients posting batches to a loopback server.

Bounded in three ways so it can never turn into an accidental flood: a fixed
request budget, a wall-clock deadline, and loopback addresses only.  Every
response is checked (status, decodable body, and the caller's ``check`` of
its content); a failed check counts as an error like a 5xx or a dropped
connection.
"""

from __future__ import annotations

import asyncio
import io
import time
from collections import Counter
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from urllib.parse import urlsplit

import numpy as np
import orjson
from numpy.typing import NDArray

from reliability.wire import Answer, Connection, WireError
from veil_client._base import JSON, NPY, encode

LOOPBACK_HOSTS = frozenset({"127.0.0.1", "localhost", "::1"})
#: Checks one answer: the index of the batch sent, the decoded output, the version header; a problem or None.
Check = Callable[[int, NDArray[np.floating], str], str | None]
WIRES = {"npy": NPY, "json": JSON}


@dataclass(frozen=True)
class LoadPlan:
    """How much load: ``requests`` in all, spread over ``clients`` concurrent connections, within ``deadline_s``."""

    clients: int
    requests: int
    batch: int
    wire: str = "npy"
    deadline_s: float = 120.0

    def __post_init__(self) -> None:
        if self.clients < 1 or self.requests < 1 or self.batch < 1:
            raise ValueError("clients, requests and batch must be at least 1")
        if self.wire not in WIRES:
            raise ValueError(f"wire must be one of {sorted(WIRES)}, not {self.wire!r}")


@dataclass
class LoadResult:
    plan: LoadPlan
    seconds: float = 0.0
    latencies: list[float] = field(default_factory=list)
    errors: int = 0
    problems: list[str] = field(default_factory=list)
    #: The version header of each answer, in the order they arrived.
    sequence: list[str] = field(default_factory=list)

    @property
    def completed(self) -> int:
        return len(self.latencies)

    @property
    def requests_per_second(self) -> float:
        return self.completed / self.seconds if self.seconds else 0.0

    @property
    def vectors_per_second(self) -> float:
        return self.requests_per_second * self.plan.batch

    def percentile_ms(self, q: float) -> float:
        return float(np.percentile(self.latencies, q) * 1000) if self.latencies else float("nan")

    @property
    def versions(self) -> Counter[str]:
        return Counter(self.sequence)

    @property
    def switches(self) -> int:
        """How often consecutive answers named different versions."""
        return sum(a != b for a, b in zip(self.sequence, self.sequence[1:], strict=False))

    def note(self, problem: str) -> None:
        self.errors += 1
        if len(self.problems) < 10:
            self.problems.append(problem)


def loopback_address(base_url: str) -> tuple[str, int]:
    """The host and port of ``base_url``, refused unless it is a loopback address."""
    parts = urlsplit(base_url)
    if parts.scheme != "http" or parts.hostname not in LOOPBACK_HOSTS:
        raise ValueError(f"the load generator only targets http:// on loopback, not {base_url!r}")
    return parts.hostname, parts.port or 80


def decode_answer(answer: Answer) -> NDArray[np.floating]:
    media = answer.headers.get("content-type", "").split(";")[0].strip()
    if media == NPY:
        array: NDArray[np.floating] = np.load(io.BytesIO(answer.body), allow_pickle=False)
        return array
    return np.asarray(orjson.loads(answer.body)["vectors"], dtype=np.float32)


async def run_load(
    base_url: str,
    path: str,
    plan: LoadPlan,
    batches: Sequence[NDArray[np.floating]],
    *,
    check: Check | None = None,
    stop: Callable[[], bool] | None = None,
    headers: dict[str, str] | None = None,
) -> LoadResult:
    """Post ``batches`` (in turn) to ``path`` until the budget, the deadline or ``stop()`` ends the run.

    Parameters
    ----------
    batches : sequence of arrays of shape (plan.batch, d)
        Encoded once up front, so the clients measure the server, not the encoder.
    check : callable, optional
        Called with each decoded answer; a returned string is counted as an error.
    stop : callable, optional
        Polled before each request: the run ends early once it returns True.
    """
    host, port = loopback_address(base_url)
    wire = WIRES[plan.wire]
    bodies = [encode(np.asarray(b, dtype=np.float32), wire)[0] for b in batches]
    request_headers = {"Content-Type": wire, "Accept": wire, **(headers or {})}
    result = LoadResult(plan)
    issued = 0
    started = time.perf_counter()
    deadline = started + plan.deadline_s

    async def one_client(connection: Connection) -> None:
        nonlocal issued
        while issued < plan.requests and time.perf_counter() < deadline and not (stop is not None and stop()):
            index = issued % len(bodies)
            issued += 1
            sent = time.perf_counter()
            try:
                answer = await connection.post(path, bodies[index], request_headers)
            except WireError as error:
                result.note(str(error))
                continue
            elapsed = time.perf_counter() - sent
            if answer.status != 200:
                result.note(f"status {answer.status}: {answer.body[:200]!r}")
                continue
            version = answer.headers.get("x-veil-version", "")
            try:
                output = decode_answer(answer)
            except (ValueError, KeyError, TypeError) as error:
                result.note(f"undecodable answer: {type(error).__name__}: {error}")
                continue
            problem = check(index, output, version) if check is not None else None
            if problem is not None:
                result.note(problem)
                continue
            result.latencies.append(elapsed)
            result.sequence.append(version)

    connections = [Connection(host, port) for _ in range(plan.clients)]
    try:
        await asyncio.gather(*(one_client(connection) for connection in connections))
    finally:
        for connection in connections:
            await connection.close()
    result.seconds = time.perf_counter() - started
    return result
