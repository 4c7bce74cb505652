"""Per-request metrics and one JSON log line, as a plain ASGI middleware (no body buffering).

It does only what it must on each request: the clock twice, the status from
the response's start, plain counts (:class:`veil.server.metrics.RequestCounts`),
and the log line only when INFO is on (the version header is looked for
only then).
"""

from __future__ import annotations

import logging
import time
from typing import Any

from starlette.types import ASGIApp, Message, Receive, Scope, Send

from veil.server.logs import RequestLog
from veil.server.metrics import ServiceMetrics

logger = logging.getLogger("veil.server")


class RequestRecorder:
    def __init__(self, app: ASGIApp, metrics: ServiceMetrics) -> None:
        self.app = app
        self.counts = metrics.requests
        self.log = RequestLog(logger)

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = time.perf_counter()
        start: Message | None = None

        async def recording_send(message: Message) -> None:
            nonlocal start
            if message["type"] == "http.response.start":
                start = message
            await send(message)

        try:
            await self.app(scope, receive, recording_send)
        finally:
            elapsed = time.perf_counter() - started
            status = 500 if start is None else start["status"]
            route = getattr(scope.get("route"), "path", "(unmatched)")
            self.counts.record(route, scope["method"], status, elapsed)
            if self.log.enabled():
                self._log(scope, route, status, elapsed, start)

    def _log(self, scope: Scope, route: str, status: int, elapsed: float, start: Message | None) -> None:
        fields: dict[str, Any] = {
            "method": scope["method"],
            "route": route,
            "status": status,
            "ms": round(elapsed * 1000, 3),
        }
        name = scope.get("path_params", {}).get("name")
        if name:
            fields["eraser"] = name
        for key, value in start.get("headers", []) if start is not None else ():
            if key == b"x-veil-version":
                fields["version"] = value.decode()
        self.log.write(fields)
