"""Re-resolve aliases every ``poll_seconds``, off the request path, so a promote or rollback reaches every replica."""

from __future__ import annotations

import asyncio
import logging

from fastapi.concurrency import run_in_threadpool

from veil.server.catalog import Catalog

logger = logging.getLogger("veil.server")


async def poll_aliases(catalog: Catalog, interval: float) -> None:
    while True:
        await asyncio.sleep(interval)
        try:
            await run_in_threadpool(catalog.reload)
        except Exception as error:  # the poller must outlive any registry trouble
            logger.error("alias poll failed", extra={"fields": {"error": type(error).__name__}})
