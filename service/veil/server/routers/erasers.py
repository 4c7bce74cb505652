"""``/v1/erasers``: what is served, and cleaning batches of embeddings with it."""

from __future__ import annotations

import json
from typing import Annotated, Any

import numpy as np
from fastapi import APIRouter, Depends, Query, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.routing import APIRoute
from numpy.typing import NDArray
from starlette.responses import Response

from veil.samples.embedding_model import EmbeddingModel
from veil.server.catalog import Catalog, ServedVersion
from veil.server.codecs import JSON_MEDIA_TYPE, json_bytes, load_json, npy_bytes, parse_json_vectors, parse_npy
from veil.server.dependencies import BATCH_PARAMETERS, EraserName, Pin, batch_call, get_catalog, require_data_token
from veil.server.errors import ServiceError, error_responses

router = APIRouter(prefix="/v1/erasers", tags=["erasers"])


def _batch_body(*, with_target: bool) -> dict[str, Any]:
    """The OpenAPI request body of a batch route (a JSON object with vectors, or a binary .npy)."""
    properties: dict[str, Any] = {
        "vectors": {"type": "array", "items": {"type": "array", "items": {"type": "number"}}},
    }
    if with_target:
        properties["target"] = {
            "oneOf": [
                {"type": "string"},
                {"type": "object", "additionalProperties": {"oneOf": [{"type": "string"}, {"type": "number"}]}},
            ],
            "description": "the target class (or ?target=); for a version of several attributes, an object naming "
            "each attribute's class (or, for a continuous one, its value)",
        }
    return {
        "content": {
            "application/json": {"schema": {"type": "object", "required": ["vectors"], "properties": properties}},
            "application/x-npy": {"schema": {"type": "string", "format": "binary"}},
        },
        "required": True,
    }


#: What a data route refuses when VEIL_DATA_TOKEN is set and the bearer token is missing or wrong.
DATA_TOKEN_ERRORS = ("unauthorized", "forbidden")
#: Every refusal of a route that reads a batch (:func:`batch_call`, :func:`decode_batch`, :func:`pick_version`).
BATCH_ERRORS = (
    "malformed_body", *DATA_TOKEN_ERRORS, "unknown_eraser", "unknown_version", "not_acceptable", "body_too_large",
    "unsupported_media_type", "invalid_request", "invalid_vectors", "wrong_dimension", "version_unavailable",
    "embedding_model_mismatch",
)  # fmt: skip
VERSION_HEADERS = {
    "X-Veil-Eraser": {"required": True, "schema": {"type": "string"}, "description": "the eraser applied"},
    "X-Veil-Version": {"required": True, "schema": {"type": "string"}, "description": "the version applied"},
}


def batch_responses(*extra_errors: str) -> dict[int | str, dict[str, Any]]:
    """The documented answers of a batch route: the cleaned batch in either format, or one of its errors."""
    vectors = {"type": "array", "items": {"type": "array", "items": {"type": "number"}}}
    cleaned = {
        "description": "the cleaned batch, in the format Accept names; X-Veil-Version names the version applied",
        "headers": VERSION_HEADERS,
        "content": {
            "application/json": {
                "schema": {
                    "type": "object",
                    "required": ["version", "vectors"],
                    "properties": {"version": {"type": "string"}, "vectors": vectors},
                }
            },
            "application/x-npy": {"schema": {"type": "string", "format": "binary"}},
        },
    }
    return {200: cleaned, **error_responses(*BATCH_ERRORS, *extra_errors)}


def summary(served: ServedVersion, alias: str) -> dict[str, Any]:
    return {
        "name": served.name,
        "alias": alias,
        "version": served.version_id,
        "method": served.artifact.method,
        **served.artifact.map.describe(),
        "normalize": served.artifact.normalize,
        "classes": served.classes,
        "embedding_model": served.card.get("embedding_model"),
    }


@router.get(
    "",
    summary="List the erasers served and their versions",
    dependencies=[Depends(require_data_token)],
    responses=error_responses(*DATA_TOKEN_ERRORS, "invalid_request"),
)
async def list_erasers(catalog: Annotated[Catalog, Depends(get_catalog)]) -> dict[str, Any]:
    return {"erasers": [summary(s, catalog.alias) for _, s in sorted(catalog.served.items())]}


@router.get(
    "/{name}",
    summary="One served eraser, with its version's card",
    dependencies=[Depends(require_data_token)],
    responses=error_responses(*DATA_TOKEN_ERRORS, "unknown_eraser", "version_unavailable", "invalid_request"),
)
async def show_eraser(name: EraserName, catalog: Annotated[Catalog, Depends(get_catalog)]) -> dict[str, Any]:
    served = catalog.current(name)
    return {**summary(served, catalog.alias), "card": served.card}


def decode_batch(body: bytes, media: str) -> tuple[NDArray[np.floating], dict[str, Any]]:
    """The vectors of a request body, and the other JSON fields (empty for ``.npy``)."""
    if media == JSON_MEDIA_TYPE:
        content = load_json(body)
        if not isinstance(content, dict) or "vectors" not in content:
            raise ServiceError("invalid_request", 'the JSON body must be an object with a "vectors" field')
        return parse_json_vectors(content["vectors"]), content
    return parse_npy(body), {}


def encode_batch(matrix: NDArray[np.floating], media: str, served: ServedVersion) -> Response:
    headers = {"X-Veil-Eraser": served.name, "X-Veil-Version": served.version_id}
    if media == JSON_MEDIA_TYPE:
        return Response(
            json_bytes({"version": served.version_id, "vectors": matrix}), media_type=media, headers=headers
        )
    return Response(npy_bytes(matrix), media_type=media, headers=headers)


async def pick_version(catalog: Catalog, name: str, pin: Pin, model: EmbeddingModel | None = None) -> ServedVersion:
    """The version that serves the request: the current one, or the one pinned; refused if it was fitted on
    another embedding model than the one ``model`` states."""
    if pin.version is None and pin.alias is None:
        served = catalog.current(name)
    else:
        # A pinned version may need loading and verifying: off the event loop.
        served = await run_in_threadpool(catalog.resolve, name, version=pin.version, alias=pin.alias)
    served.check_model(model)
    return served


@router.post(
    "/{name}/apply",
    summary="Erase the attribute from a batch of embeddings",
    openapi_extra={"requestBody": _batch_body(with_target=False), "parameters": BATCH_PARAMETERS},
    responses=batch_responses(),
)
async def apply(name: EraserName, request: Request) -> Response:
    call = await batch_call(request)
    state = request.app.state
    served = await pick_version(state.catalog, name, call.pin, call.model)
    vectors, _ = decode_batch(call.body, call.media)
    cleaned = served.apply(vectors)
    state.reservoirs.add(name, vectors)
    state.metrics.cleaned(name, served.version_id, vectors.shape[0])
    return encode_batch(cleaned, call.answer, served)


def apply_route() -> APIRoute:
    """The route of :func:`apply` (:class:`veil.server.hotpath.ApplyHotPath` calls it directly)."""
    for route in router.routes:
        if isinstance(route, APIRoute) and route.endpoint is apply:
            return route
    raise LookupError("the apply route is not on the router")


@router.post(
    "/{name}/counterfactual",
    summary="Erase, then give every vector the attribute component of a target class",
    openapi_extra={"requestBody": _batch_body(with_target=True), "parameters": BATCH_PARAMETERS},
    responses=batch_responses("unknown_class"),
)
async def counterfactual(
    name: EraserName,
    request: Request,
    target: Annotated[
        str | None,
        Query(
            description="the target class (or the JSON body's target); for a version of several attributes, a JSON "
            'object naming each one\'s target, e.g. {"pronoun": "she", "age_bracket": "over 50"}'
        ),
    ] = None,
) -> Response:
    call = await batch_call(request)
    served = await pick_version(request.app.state.catalog, name, call.pin, call.model)
    vectors, fields = decode_batch(call.body, call.media)
    chosen = fields.get("target", target)
    if isinstance(chosen, str) and served.attributes and chosen.lstrip().startswith("{"):
        try:
            chosen = json.loads(chosen)
        except json.JSONDecodeError:
            raise ServiceError("invalid_request", "?target= does not read as a JSON object") from None
    if not isinstance(chosen, (str, dict)):
        raise ServiceError("invalid_request", 'give the target class as ?target= or a JSON "target" string')
    return encode_batch(served.counterfactual(vectors, chosen), call.answer, served)
