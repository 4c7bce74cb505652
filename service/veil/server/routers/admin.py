"""``/v1/admin``: operations that change what this replica serves (bearer token required)."""

from __future__ import annotations

from typing import Annotated, Any

from fastapi import APIRouter, Depends
from fastapi.concurrency import run_in_threadpool

from veil.server.catalog import Catalog
from veil.server.dependencies import get_catalog, require_admin
from veil.server.errors import error_responses

router = APIRouter(prefix="/v1/admin", tags=["admin"], dependencies=[Depends(require_admin)])


@router.post(
    "/reload",
    summary="Re-resolve every alias now and swap in changed versions",
    responses=error_responses("unauthorized", "admin_disabled", "forbidden", "invalid_request"),
)
async def reload(catalog: Annotated[Catalog, Depends(get_catalog)]) -> dict[str, Any]:
    outcome = await run_in_threadpool(catalog.reload)
    served = {name: s.version_id for name, s in sorted(catalog.served.items())}
    return {"loaded": outcome.loaded, "failed": outcome.failed, "serving": served}
