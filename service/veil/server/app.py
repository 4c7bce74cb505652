"""The ASGI app factory: wiring only.  ``uvicorn --factory veil.server.app:create_app`` serves it.

Erasers are loaded in the lifespan (never at import), then kept fresh by the
alias poller and ``POST /v1/admin/reload``.
"""

from __future__ import annotations

import asyncio
import contextlib
from collections.abc import AsyncIterator
from importlib import metadata

from fastapi import FastAPI
from fastapi.concurrency import run_in_threadpool
from fastapi.middleware.cors import CORSMiddleware
from threadpoolctl import threadpool_limits

from veil.registry import Registry
from veil.server.catalog import Catalog
from veil.server.errors import install_error_handlers
from veil.server.hotpath import ApplyHotPath
from veil.server.logs import configure_logging
from veil.server.metrics import ServiceMetrics
from veil.server.middleware import RequestRecorder
from veil.server.poller import poll_aliases
from veil.server.reservoir import ReservoirBank
from veil.server.routers import admin, bench, drift, erasers, health, search, traffic
from veil.server.settings import ServiceSettings, load_settings


def create_app(settings: ServiceSettings | None = None) -> FastAPI:
    settings = settings or load_settings()
    configure_logging(settings.log_level)
    metrics = ServiceMetrics()

    @contextlib.asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        catalog = Catalog(
            Registry(settings.registry),
            names=settings.names,
            alias=settings.alias,
            metrics=metrics,
            max_pinned=settings.max_pinned_versions,
            threshold_overrides=settings.thresholds,
        )
        app.state.catalog = catalog
        # Requests are small matrix products: BLAS threads spinning on a 2-core box cost more than they give.
        blas = threadpool_limits(limits=settings.blas_threads, user_api="blas")
        await run_in_threadpool(catalog.reload)
        poller = asyncio.create_task(poll_aliases(catalog, settings.poll_seconds)) if settings.poll_seconds else None
        try:
            yield
        finally:
            blas.restore_original_limits()
            if poller is not None:
                poller.cancel()
                with contextlib.suppress(asyncio.CancelledError):
                    await poller

    app = FastAPI(
        title="veil",
        version=metadata.version("veil"),
        summary="Erase a protected attribute from embeddings on the fly, and check that it stays out.",
        lifespan=lifespan,
    )
    app.state.settings = settings
    app.state.metrics = metrics
    app.state.reservoirs = ReservoirBank(settings.reservoir_size)
    install_error_handlers(app)
    for router in (erasers.router, search.router, drift.router, traffic.router, health.router, admin.router):
        app.include_router(router)
    if settings.benchmark_echo:
        app.include_router(bench.router)
    # Innermost, so that CORS and the request recorder see the hot path's requests like any other.
    app.add_middleware(ApplyHotPath, route=erasers.apply_route())
    if settings.cors_origins:
        app.add_middleware(CORSMiddleware, allow_origins=settings.cors_origins, allow_methods=["GET", "POST"])
    app.add_middleware(RequestRecorder, metrics=metrics)
    return app
