"""``/v1/erasers/{name}/search-vector``: query-side vectors that search a raw index as if it held cleaned vectors."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Request
from starlette.responses import Response

from veil.maps.search import DEFAULT_METRIC, METRICS, inexact_reason, search_vectors
from veil.server.codecs import JSON_MEDIA_TYPE, json_bytes, npy_bytes
from veil.server.dependencies import BATCH_PARAMETERS, EraserName, batch_call
from veil.server.errors import ServiceError, error_responses
from veil.server.routers.erasers import BATCH_ERRORS, VERSION_HEADERS, decode_batch, pick_version

router = APIRouter(prefix="/v1/erasers", tags=["search"])

_EXACT_VALUES = {"true": True, "1": True, "false": False, "0": False}
_PARAMETERS = [
    *BATCH_PARAMETERS,
    {
        "name": "metric",
        "in": "query",
        "required": False,
        "schema": {"type": "string", "enum": list(METRICS), "default": DEFAULT_METRIC},
        "description": "the raw index's metric; only inner_product can be exact",
    },
    {
        "name": "exact",
        "in": "query",
        "required": False,
        "schema": {"type": "string", "enum": list(_EXACT_VALUES), "default": "false"},
        "description": "refuse with 422 inexact_search rather than answer inexactly",
    },
]
_HEADERS = {
    **VERSION_HEADERS,
    "X-Veil-Search-Exact": {
        "required": True,
        "schema": {"type": "string", "enum": ["true", "false"]},
        "description": "whether the raw index ranks by these vectors exactly as the cleaned index would",
    },
}
_MATRIX = {"type": "array", "items": {"type": "array", "items": {"type": "number"}}}
_BODY = {
    "content": {
        "application/json": {"schema": {"type": "object", "required": ["vectors"], "properties": {"vectors": _MATRIX}}},
        "application/x-npy": {"schema": {"type": "string", "format": "binary"}},
    },
    "required": True,
}
_ANSWER = {
    "description": "Aᵀ r(q) for each query, in the format Accept names (.npy: the vectors only)",
    "headers": _HEADERS,
    "content": {
        "application/json": {
            "schema": {
                "type": "object",
                "required": ["version", "vectors", "offsets", "exact", "metric", "note"],
                "properties": {
                    "version": {"type": "string"},
                    "vectors": _MATRIX,
                    "offsets": {
                        "anyOf": [{"type": "array", "items": {"type": "number"}}, {"type": "null"}],
                        "description": "⟨r(q), b⟩ per query, added to a raw inner product gives the cleaned one",
                    },
                    "exact": {"type": "boolean"},
                    "metric": {"type": "string"},
                    "note": {"type": "string", "description": "why the answer is not exact (empty if it is)"},
                },
            }
        },
        "application/x-npy": {"schema": {"type": "string", "format": "binary"}},
    },
}


def _options(request: Request) -> tuple[str, bool]:
    query = request.query_params
    metric = query.get("metric", DEFAULT_METRIC)
    if metric not in METRICS:
        raise ServiceError("invalid_request", f"metric must be one of {', '.join(METRICS)}, got {metric!r}")
    exact = query.get("exact", "false").lower()
    if exact not in _EXACT_VALUES:
        raise ServiceError("invalid_request", f"exact must be true or false, got {exact!r}")
    return metric, _EXACT_VALUES[exact]


@router.post(
    "/{name}/search-vector",
    summary="Query vectors that search a raw index as the index of the cleaned corpus would rank",
    openapi_extra={"requestBody": _BODY, "parameters": _PARAMETERS},
    responses={200: _ANSWER, **error_responses(*BATCH_ERRORS, "inexact_search")},
)
async def search_vector(name: EraserName, request: Request) -> Response:
    call = await batch_call(request)
    metric, require_exact = _options(request)
    state = request.app.state
    served = await pick_version(state.catalog, name, call.pin, call.model)
    vectors, _ = decode_batch(call.body, call.media)
    served.check_dim(vectors)
    note = inexact_reason(served.artifact, metric)
    if require_exact and note:
        raise ServiceError(
            "inexact_search", f"{served.name} {served.version_id} gives no exact answer for a {metric} index: {note}"
        )
    answer = search_vectors(served.artifact, vectors, metric=metric)
    state.reservoirs.add(name, vectors)
    state.metrics.vectors.labels(name, served.version_id).inc(vectors.shape[0])
    headers = {
        "X-Veil-Eraser": served.name,
        "X-Veil-Version": served.version_id,
        "X-Veil-Search-Exact": "true" if answer.exact else "false",
    }
    if call.answer != JSON_MEDIA_TYPE:
        return Response(npy_bytes(answer.vectors), media_type=call.answer, headers=headers)
    content: dict[str, Any] = {
        "version": served.version_id,
        "vectors": answer.vectors,
        "offsets": answer.offsets,
        "exact": answer.exact,
        "metric": metric,
        "note": answer.note,
    }
    return Response(json_bytes(content), media_type=call.answer, headers=headers)
