"""Per-request metrics and one JSON log line, as a plain ASGI middleware (no body buffering)."""

from __future__ import annotations

import logging
import time
from typing import Any

from starlette.types import ASGIApp, Message, Receive, Scope, Send

from veil.server.metrics import ServiceMetrics

logger = logging.getLogger("veil.server")


class RequestRecorder:
    def __init__(self, app: ASGIApp, metrics: ServiceMetrics) -> None:
        self.app = app
        self.metrics = metrics

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = time.perf_counter()
        status = 500
        version = ""

        async def recording_send(message: Message) -> None:
            nonlocal status, version
            if message["type"] == "http.response.start":
                status = message["status"]
                for key, value in message.get("headers", []):
                    if key == b"x-veil-version":
                        version = value.decode()
            await send(message)

        try:
            await self.app(scope, receive, recording_send)
        finally:
            elapsed = time.perf_counter() - started
            route = getattr(scope.get("route"), "path", "(unmatched)")
            self.metrics.requests.labels(route, scope["method"], str(status)).inc()
            self.metrics.latency.labels(route).observe(elapsed)
            if logger.isEnabledFor(logging.INFO):
                self._log(scope, route, status, elapsed, version)

    @staticmethod
    def _log(scope: Scope, route: str, status: int, elapsed: float, version: str) -> None:
        fields: dict[str, Any] = {
            "method": scope["method"],
            "route": route,
            "status": status,
            "ms": round(elapsed * 1000, 3),
        }
        name = scope.get("path_params", {}).get("name")
        if name:
            fields["eraser"] = name
        if version:
            fields["version"] = version
        logger.info("request", extra={"fields": fields})
