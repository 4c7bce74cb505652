"""A raw keep-alive HTTP/1.1 load generator for ``make bench``: one process, asyncio protocols on uvloop.

``python benchmarks/http_load.py PORT PATH CONTENT_TYPE BODY_FILE CONNECTIONS WARMUP SECONDS`` opens
``CONNECTIONS`` keep-alive connections to ``127.0.0.1:PORT``; each sends the same ``POST`` again as soon as
the answer before it is complete (one request in flight per connection, no pipelining).  Requests answered
in the ``WARMUP`` seconds are not counted; those answered in the ``SECONDS`` after are.  It prints one JSON
line: ``requests`` (in the window), ``answered`` (warm-up included), ``seconds``, ``requests_per_s``,
``p50_ms``, ``p99_ms``.

Why not httpx: its pool costs more client CPU per request than the service under test, and the client shares
the machine's two cores with the server, so a heavy client would measure itself.  This one does only what the
measurement needs: the request bytes are built once, the answer's head is scanned once for its status and
``Content-Length``, and the body is counted, not kept.  Any status but 200 stops the run with an error.
It imports neither numpy nor veil, so starting it costs little.
"""

from __future__ import annotations

import asyncio
import json
import sys
import time
from pathlib import Path
from typing import cast


class LoadError(Exception):
    """The server answered something other than 200, or broke the connection."""


class _Connection(asyncio.Protocol):
    def __init__(self, request: bytes, run: _Run) -> None:
        self.request = request
        self.run = run
        self.transport: asyncio.Transport | None = None
        self.head = bytearray()
        self.remaining = -1  # body bytes still to come; -1 while the head is being read
        self.sent = 0.0
        self.closed: asyncio.Future[None] = asyncio.get_running_loop().create_future()

    def connection_made(self, transport: asyncio.BaseTransport) -> None:
        # uvloop's transports are not subclasses of asyncio's, though they behave as one.
        self.transport = cast(asyncio.Transport, transport)
        self._send()

    def _send(self) -> None:
        assert self.transport is not None
        self.sent = time.perf_counter()
        self.transport.write(self.request)

    def data_received(self, data: bytes) -> None:
        if self.remaining < 0:
            self.head += data
            end = self.head.find(b"\r\n\r\n")
            if end < 0:
                return
            head = bytes(self.head[:end]).lower()
            if head[9:12] != b"200":
                self._fail(f"answered {bytes(self.head[:end]).decode('latin1')!r}")
                return
            marker = head.find(b"\r\ncontent-length:")
            if marker < 0:
                self._fail("answered without a Content-Length")
                return
            close = head.find(b"\r\n", marker + 2)
            length = int(head[marker + 17 : close if close >= 0 else len(head)])
            self.remaining = length - (len(self.head) - end - 4)
            self.head.clear()
        else:
            self.remaining -= len(data)
        if self.remaining > 0:
            return
        if self.remaining < 0:
            self._fail("sent more bytes than its Content-Length")
            return
        self.remaining = -1
        now = time.perf_counter()
        self.run.answered(self.sent, now)
        if now < self.run.stop:
            self._send()
        else:
            assert self.transport is not None
            self.transport.close()

    def _fail(self, problem: str) -> None:
        if not self.closed.done():
            self.closed.set_exception(LoadError(problem))
        if self.transport is not None:
            self.transport.close()

    def connection_lost(self, exc: Exception | None) -> None:
        if not self.closed.done():
            if self.remaining >= 0 or self.head:
                self.closed.set_exception(LoadError(f"the connection closed mid-answer ({exc})"))
            else:
                self.closed.set_result(None)


class _Run:
    def __init__(self, warmup: float, seconds: float) -> None:
        now = time.perf_counter()
        self.start = now + warmup
        self.stop = self.start + seconds
        self.latencies: list[float] = []
        self.total = 0

    def answered(self, sent: float, now: float) -> None:
        self.total += 1
        if self.start <= sent and now <= self.stop:
            self.latencies.append(now - sent)


def _percentile(ordered: list[float], share: float) -> float:
    return ordered[min(len(ordered) - 1, round(share * (len(ordered) - 1)))]


async def measure(
    port: int, path: str, content_type: str, body: bytes, *, connections: int, warmup: float, seconds: float
) -> dict[str, float]:
    """Load ``POST path`` on loopback and measure requests answered per second and latency percentiles."""
    request = (
        f"POST {path} HTTP/1.1\r\nHost: 127.0.0.1:{port}\r\nContent-Type: {content_type}\r\n"
        f"Content-Length: {len(body)}\r\n\r\n"
    ).encode("latin1") + body
    loop = asyncio.get_running_loop()
    run = _Run(warmup, seconds)
    opened = [
        await loop.create_connection(lambda: _Connection(request, run), "127.0.0.1", port) for _ in range(connections)
    ]
    # A server that stops answering ends the run with an error, not a hang.
    await asyncio.wait_for(asyncio.gather(*(protocol.closed for _, protocol in opened)), warmup + seconds + 60)
    ordered = sorted(run.latencies)
    if not ordered:
        raise LoadError("no request was answered within the measured window")
    return {
        "requests": len(ordered),
        "answered": run.total,
        "seconds": seconds,
        "requests_per_s": len(ordered) / seconds,
        "p50_ms": _percentile(ordered, 0.50) * 1e3,
        "p99_ms": _percentile(ordered, 0.99) * 1e3,
    }


def main(arguments: list[str]) -> int:
    port, path, content_type, body_file, connections, warmup, seconds = arguments
    body = Path(body_file).read_bytes()
    try:
        import uvloop

        runner = uvloop.run
    except ImportError:  # the pure-Python loop measures the same, with more client CPU per request
        runner = asyncio.run
    try:
        result = runner(
            measure(
                int(port), path, content_type, body,
                connections=int(connections), warmup=float(warmup), seconds=float(seconds),
            )
        )  # fmt: skip
    except (LoadError, OSError, TimeoutError) as error:
        print(f"load failed: {error}", file=sys.stderr)
        return 1
    print(json.dumps(result))
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
