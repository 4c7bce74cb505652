"""What routes get injected: the catalog, settings, the body (size-limited), auth, content negotiation, pinning.

Every dependency is ``async def``: none blocks, and FastAPI would otherwise
run each plain ``def`` dependency in a worker thread, which costs more than
the erasure itself on small batches.
"""

from __future__ import annotations

import hmac
from dataclasses import dataclass
from typing import Annotated, Any

from fastapi import Depends, Header, Path, Request
from pydantic import SecretStr
from starlette.types import Scope

from veil.errors import DataError
from veil.samples.embedding_model import EmbeddingModel
from veil.server.catalog import Catalog
from veil.server.codecs import JSON_MEDIA_TYPE, NPY_MEDIA_TYPE
from veil.server.errors import ServiceError
from veil.server.metrics import ServiceMetrics
from veil.server.reservoir import ReservoirBank
from veil.server.settings import ServiceSettings

#: The ``{name}`` path parameter of every eraser route.
EraserName = Annotated[str, Path(description="the eraser's name in the registry, e.g. profiles-minilm")]
_TOKEN_HEADER = "`Bearer <token>`"


async def get_settings(request: Request) -> ServiceSettings:
    settings: ServiceSettings = request.app.state.settings
    return settings


async def get_catalog(request: Request) -> Catalog:
    catalog: Catalog = request.app.state.catalog
    return catalog


async def get_metrics(request: Request) -> ServiceMetrics:
    metrics: ServiceMetrics = request.app.state.metrics
    return metrics


async def get_reservoirs(request: Request) -> ReservoirBank:
    reservoirs: ReservoirBank = request.app.state.reservoirs
    return reservoirs


def _check_bearer(authorization: str | None, expected: SecretStr) -> None:
    if not authorization:
        raise ServiceError("unauthorized", "this route needs 'Authorization: Bearer <token>'")
    scheme, _, token = authorization.partition(" ")
    # Constant-time comparison: the time taken says nothing about how much of the token matched.
    if scheme.lower() != "bearer" or not hmac.compare_digest(token.encode(), expected.get_secret_value().encode()):
        raise ServiceError("forbidden", "the bearer token is not valid for this route")


async def require_admin(
    settings: Annotated[ServiceSettings, Depends(get_settings)],
    authorization: Annotated[str | None, Header(description=f"{_TOKEN_HEADER} with VEIL_ADMIN_TOKEN")] = None,
) -> None:
    if settings.admin_token is None:
        raise ServiceError("admin_disabled", "admin routes are off: no VEIL_ADMIN_TOKEN is configured")
    _check_bearer(authorization, settings.admin_token)


async def require_data_token(
    settings: Annotated[ServiceSettings, Depends(get_settings)],
    authorization: Annotated[str | None, Header(description=f"{_TOKEN_HEADER}, if VEIL_DATA_TOKEN is set")] = None,
) -> None:
    if settings.data_token is not None:
        _check_bearer(authorization, settings.data_token)


async def read_body(request: Request, limit: int) -> bytes:
    """The request body, refused with 413 as soon as it passes ``limit`` bytes (never read in full first)."""
    return await _read_body(request, limit, request.headers.get("content-length"))


async def _read_body(request: Request, limit: int, declared: str | None) -> bytes:
    """:func:`read_body`, given the request's ``Content-Length`` (if it sent one) already read."""
    if declared is not None and declared.isdigit() and int(declared) > limit:
        raise ServiceError("body_too_large", f"the body is {declared} bytes; the limit is {limit}")
    chunks, size = [], 0
    async for chunk in request.stream():
        size += len(chunk)
        if size > limit:
            raise ServiceError("body_too_large", f"the body is over the {limit}-byte limit")
        chunks.append(chunk)
    return chunks[0] if len(chunks) == 1 else b"".join(chunks)


def _media(value: str | None) -> str:
    return (value or "").split(";", 1)[0].strip().lower()


def request_media(content_type: str | None) -> str:
    media = _media(content_type)
    if media not in (JSON_MEDIA_TYPE, NPY_MEDIA_TYPE):
        raise ServiceError(
            "unsupported_media_type", f"Content-Type {media or '(none)'} is not {JSON_MEDIA_TYPE} or {NPY_MEDIA_TYPE}"
        )
    return media


def response_media(requested: str, accept: str | None) -> str:
    """The format named by ``Accept``; the request's own for ``*/*`` or no header."""
    if not accept:
        return requested
    for media in (_media(part) for part in accept.split(",")):
        if media in (JSON_MEDIA_TYPE, NPY_MEDIA_TYPE):
            return media
        if media in ("*/*", "application/*"):
            return requested
    raise ServiceError("not_acceptable", f"Accept {accept!r} names neither {JSON_MEDIA_TYPE} nor {NPY_MEDIA_TYPE}")


@dataclass(frozen=True)
class Pin:
    version: str | None
    alias: str | None


@dataclass(frozen=True)
class BatchCall:
    """Everything a batch route needs from its request: body, formats in and out, the version pin, and the
    embedding model the caller states (None: not stated)."""

    body: bytes
    media: str
    answer: str
    pin: Pin
    model: EmbeddingModel | None = None


#: The request headers a batch route reads (lower case, as ASGI gives them).
_BATCH_HEADERS = frozenset(
    (
        b"authorization", b"content-type", b"accept", b"content-length", b"x-veil-version", b"x-veil-alias",
        b"x-veil-embedding-model",
    )
)  # fmt: skip
#: The header a caller states the embedding model of its vectors in: ``NAME`` or ``NAME@VERSION``.
MODEL_HEADER = "X-Veil-Embedding-Model"


def batch_headers(scope: Scope) -> dict[bytes, str]:
    """The headers :func:`batch_call` reads, in one pass over the request's; the first of repeated ones wins.

    Starlette's ``request.headers.get`` scans and decodes the whole list on
    each call, and a batch request asked for six.
    """
    found: dict[bytes, str] = {}
    for key, value in scope["headers"]:
        if key in _BATCH_HEADERS and key not in found:
            found[key] = value.decode("latin-1")
    return found


async def batch_call(request: Request) -> BatchCall:
    """Read a batch request by hand.

    The hot routes take the raw ``Request`` instead of declaring each header
    and query parameter: FastAPI's per-parameter validation cost more than
    the erasure on a 256-row batch.  :data:`BATCH_PARAMETERS` documents the
    parameters in the OpenAPI schema all the same.
    """
    settings: ServiceSettings = request.app.state.settings
    headers = batch_headers(request.scope)
    if settings.data_token is not None:
        _check_bearer(headers.get(b"authorization"), settings.data_token)
    media = request_media(headers.get(b"content-type"))
    answer = response_media(media, headers.get(b"accept"))
    pin = _pin(request, headers.get(b"x-veil-version"), headers.get(b"x-veil-alias"))
    model = stated_model(headers.get(b"x-veil-embedding-model"))
    body = await _read_body(request, settings.max_body_bytes, headers.get(b"content-length"))
    return BatchCall(body=body, media=media, answer=answer, pin=pin, model=model)


def stated_model(header: str | None) -> EmbeddingModel | None:
    """The model :data:`MODEL_HEADER` states (None when absent or empty); one that does not read is a 422."""
    if not header or not header.strip():
        return None
    try:
        return EmbeddingModel.parse(header)
    except DataError as error:
        raise ServiceError("invalid_request", f"{MODEL_HEADER}: {error}") from None


def pin_of(request: Request) -> Pin:
    """The version or alias a request pins (``?version=`` / ``?alias=`` or their headers), if any."""
    return _pin(request, request.headers.get("x-veil-version"), request.headers.get("x-veil-alias"))


def _pin(request: Request, version_header: str | None, alias_header: str | None) -> Pin:
    # The query string is parsed only when there is one (most requests pin nothing).
    query = request.query_params if request.scope.get("query_string") else {}
    version = query.get("version") or version_header or None
    alias = query.get("alias") or alias_header or None
    if version and alias:
        raise ServiceError("invalid_request", "pin a version or an alias, not both")
    return Pin(version=version, alias=alias)


def _parameter(name: str, where: str, description: str) -> dict[str, Any]:
    return {"name": name, "in": where, "required": False, "schema": {"type": "string"}, "description": description}


#: The OpenAPI description of what :func:`pin_of` reads.
PIN_PARAMETERS = [
    _parameter("version", "query", "pin a version id or sequence number"),
    _parameter("alias", "query", "use another alias than the served one"),
    _parameter("X-Veil-Version", "header", "pin a version (as the query parameter)"),
    _parameter("X-Veil-Alias", "header", "use another alias (as the query parameter)"),
]
#: The OpenAPI description of what :func:`batch_call` reads.
BATCH_PARAMETERS = [
    *PIN_PARAMETERS,
    _parameter(
        MODEL_HEADER,
        "header",
        "the embedding model that made the vectors, NAME or NAME@VERSION: refused with 409 "
        "embedding_model_mismatch if the version was fitted on another (versions compared when both name one); "
        "without it, or for a version that records no model, only the dimension is checked",
    ),
    _parameter("Content-Type", "header", "application/json or application/x-npy"),
    _parameter("Accept", "header", "the response format; default: the request's"),
    _parameter("Authorization", "header", f"{_TOKEN_HEADER}, if VEIL_DATA_TOKEN is set"),
]
