"""``/healthz`` (alive), ``/readyz`` (every configured eraser loaded and verified), ``/metrics`` (Prometheus)."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Depends
from prometheus_client import CONTENT_TYPE_LATEST
from starlette.responses import Response

from veil.server.catalog import Catalog
from veil.server.dependencies import get_catalog, get_metrics
from veil.server.errors import error_response, error_responses
from veil.server.metrics import ServiceMetrics

router = APIRouter(tags=["health"])


@router.get("/healthz", summary="The process is alive")
async def healthz() -> dict[str, str]:
    return {"status": "alive"}


@router.get(
    "/readyz",
    summary="Every configured eraser is loaded and verified",
    response_model=None,
    responses={200: {"content": {"application/json": {"schema": {"type": "object"}}}}, **error_responses("not_ready")},
)
async def readyz(catalog: Annotated[Catalog, Depends(get_catalog)]) -> dict[str, Any] | Response:
    ready, missing = catalog.ready()
    if not ready:
        problems = [f"{name}: {catalog.failures.get(name, 'not loaded')}" for name in missing]
        if catalog.registry_problem is not None:
            problems.insert(0, catalog.registry_problem)
        return error_response("not_ready", "; ".join(problems) or "no eraser is loaded")
    served = {name: s.version_id for name, s in sorted(catalog.served.items())}
    # Still ready: a refused next version must not take every replica out of rotation.  ``stale`` says so.
    return {
        "status": "ready",
        "alias": catalog.alias,
        "erasers": served,
        "stale": sorted(catalog.failures),
        "last_failures": catalog.failures,
    }


@router.get(
    "/metrics",
    summary="Prometheus metrics",
    response_class=Response,
    responses={200: {"content": {CONTENT_TYPE_LATEST.split(";")[0]: {"schema": {"type": "string"}}}}},
)
async def metrics(service_metrics: Annotated[ServiceMetrics, Depends(get_metrics)]) -> Response:
    return Response(service_metrics.render(), media_type=CONTENT_TYPE_LATEST)
