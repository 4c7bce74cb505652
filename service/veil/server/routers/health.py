"""``/healthz`` (alive), ``/readyz`` (every configured eraser loaded and verified), ``/metrics`` (Prometheus)."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Depends
from prometheus_client import CONTENT_TYPE_LATEST
from starlette.responses import Response

from veil.server.catalog import Catalog
from veil.server.dependencies import get_catalog, get_metrics
from veil.server.errors import error_response
from veil.server.metrics import ServiceMetrics

router = APIRouter(tags=["health"])


@router.get("/healthz", summary="The process is alive")
async def healthz() -> dict[str, str]:
    return {"status": "alive"}


@router.get("/readyz", summary="Every configured eraser is loaded and verified", response_model=None)
async def readyz(catalog: Annotated[Catalog, Depends(get_catalog)]) -> dict[str, Any] | Response:
    ready, missing = catalog.ready()
    if not ready:
        problems = "; ".join(f"{name}: {catalog.failures.get(name, 'not loaded')}" for name in missing)
        return error_response("not_ready", problems or "no eraser is loaded")
    served = {name: s.version_id for name, s in sorted(catalog.served.items())}
    return {"status": "ready", "alias": catalog.alias, "erasers": served, "last_failures": catalog.failures}


@router.get("/metrics", summary="Prometheus metrics")
async def metrics(service_metrics: Annotated[ServiceMetrics, Depends(get_metrics)]) -> Response:
    return Response(service_metrics.render(), media_type=CONTENT_TYPE_LATEST)
