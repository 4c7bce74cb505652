"""One JSON object per log line; request lines carry route, status and timing, never payloads or tokens."""

from __future__ import annotations

import logging
import sys
from datetime import UTC, datetime

import orjson


class JsonFormatter(logging.Formatter):
    def format(self, record: logging.LogRecord) -> str:
        line = {
            "time": datetime.fromtimestamp(record.created, UTC).isoformat(timespec="milliseconds"),
            "level": record.levelname.lower(),
            "event": record.getMessage(),
            **getattr(record, "fields", {}),
        }
        return orjson.dumps(line, default=str).decode()


def configure_logging(level: str) -> None:
    logger = logging.getLogger("veil.server")
    logger.setLevel(level.upper())
    if not any(getattr(h, "veil_json", False) for h in logger.handlers):
        handler = logging.StreamHandler(sys.stderr)
        handler.setFormatter(JsonFormatter())
        handler.veil_json = True  # type: ignore[attr-defined]
        logger.addHandler(handler)
        logger.propagate = False
