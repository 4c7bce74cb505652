"""``/v1/erasers/{name}/recent``: this replica's reservoir of recent raw vectors, for a patrol to merge.

Behind a load balancer each replica holds a sample of its own share of the
traffic.  ``veil patrol`` asks every replica for its sample, how many
vectors that sample stands for (``traffic_seen``, every vector cleaned for
the eraser, repeats included) and the version it serves, and checks the
merged sample once.  The route reads the reservoir only: it is not on the
apply path and costs a copy of at most ``VEIL_RESERVOIR_SIZE`` rows.
"""

from __future__ import annotations

from typing import Annotated, Any

import numpy as np
from fastapi import APIRouter, Depends, Header
from fastapi.concurrency import run_in_threadpool
from numpy.typing import NDArray
from starlette.responses import Response

from veil.server.catalog import Catalog
from veil.server.codecs import JSON_MEDIA_TYPE, NPY_MEDIA_TYPE, json_bytes, npy_bytes
from veil.server.dependencies import EraserName, get_catalog, get_reservoirs, require_admin, response_media
from veil.server.errors import error_responses
from veil.server.reservoir import ReservoirBank

router = APIRouter(prefix="/v1/erasers", tags=["drift"])

#: The answer's headers, in either format: what the sample stands for.
SEEN_HEADER = "X-Veil-Traffic-Seen"
_HEADERS = {
    "X-Veil-Eraser": {"required": True, "schema": {"type": "string"}, "description": "the eraser"},
    "X-Veil-Version": {"required": True, "schema": {"type": "string"}, "description": "the version served"},
    SEEN_HEADER: {
        "required": True,
        "schema": {"type": "integer"},
        "description": "every vector this replica has cleaned for the eraser since its sample began, repeats included",
    },
}
_ERRORS = (
    "unauthorized",
    "admin_disabled",
    "forbidden",
    "unknown_eraser",
    "version_unavailable",
    "not_acceptable",
    "invalid_request",
)
_ANSWER: dict[int | str, dict[str, Any]] = {
    200: {
        "description": "the distinct raw vectors held (zero rows before any traffic), in the format Accept names",
        "headers": _HEADERS,
        "content": {
            "application/json": {
                "schema": {
                    "type": "object",
                    "required": ["eraser", "version", "traffic_seen", "rows", "vectors"],
                    "properties": {
                        "eraser": {"type": "string"},
                        "version": {"type": "string"},
                        "traffic_seen": {"type": "integer"},
                        "rows": {"type": "integer"},
                        "vectors": {"type": "array", "items": {"type": "array", "items": {"type": "number"}}},
                    },
                }
            },
            NPY_MEDIA_TYPE: {"schema": {"type": "string", "format": "binary"}},
        },
    }
}


def _held(reservoirs: ReservoirBank, name: str, dim: int) -> tuple[NDArray[np.float32], int]:
    """The reservoir's rows and the vectors they stand for; none if it holds another dimension than ``dim``."""
    reservoir = reservoirs.get(name)
    if reservoir is None or reservoir.dim != dim:
        # Traffic of an earlier version's dimension is not a sample of what the version served cleans.
        return np.empty((0, dim), dtype=np.float32), 0
    return reservoir.snapshot()


@router.get(
    "/{name}/recent",
    summary="The distinct raw vectors this replica has recently cleaned, how many it cleaned, and its version",
    # The admin token, not the data token: these are other callers' raw vectors, which still carry the attribute.
    dependencies=[Depends(require_admin)],
    response_class=Response,
    responses={**_ANSWER, **error_responses(*_ERRORS)},
)
async def recent_traffic(
    name: EraserName,
    catalog: Annotated[Catalog, Depends(get_catalog)],
    reservoirs: Annotated[ReservoirBank, Depends(get_reservoirs)],
    accept: Annotated[str | None, Header(description="application/json (default) or application/x-npy")] = None,
) -> Response:
    answer = response_media(JSON_MEDIA_TYPE, accept)
    served = catalog.current(name)
    # Folding the batches queued since the last read samples them: off the event loop.
    rows, seen = await run_in_threadpool(_held, reservoirs, name, served.dim)
    headers = {"X-Veil-Eraser": served.name, "X-Veil-Version": served.version_id, SEEN_HEADER: str(seen)}
    if answer == NPY_MEDIA_TYPE:
        return Response(npy_bytes(rows), media_type=answer, headers=headers)
    content: dict[str, Any] = {
        "eraser": served.name,
        "version": served.version_id,
        "traffic_seen": seen,
        "rows": int(rows.shape[0]),
        "vectors": rows,
    }
    return Response(json_bytes(content), media_type=answer, headers=headers)
