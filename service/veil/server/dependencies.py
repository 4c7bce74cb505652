"""What routes get injected: the catalog, settings, the body (size-limited), auth, content negotiation, pinning."""

from __future__ import annotations

import hmac
from dataclasses import dataclass
from typing import Annotated

from fastapi import Depends, Header, Path, Query, Request
from pydantic import SecretStr

from veil.server.catalog import Catalog
from veil.server.codecs import JSON_MEDIA_TYPE, NPY_MEDIA_TYPE
from veil.server.errors import ServiceError
from veil.server.metrics import ServiceMetrics
from veil.server.reservoir import ReservoirBank
from veil.server.settings import ServiceSettings

#: The ``{name}`` path parameter of every eraser route.
EraserName = Annotated[str, Path(description="the eraser's name in the registry, e.g. profiles-minilm")]
_TOKEN_HEADER = "`Bearer <token>`"


def get_settings(request: Request) -> ServiceSettings:
    settings: ServiceSettings = request.app.state.settings
    return settings


def get_catalog(request: Request) -> Catalog:
    catalog: Catalog = request.app.state.catalog
    return catalog


def get_metrics(request: Request) -> ServiceMetrics:
    metrics: ServiceMetrics = request.app.state.metrics
    return metrics


def get_reservoirs(request: Request) -> ReservoirBank:
    reservoirs: ReservoirBank = request.app.state.reservoirs
    return reservoirs


def _check_bearer(authorization: str | None, expected: SecretStr) -> None:
    if not authorization:
        raise ServiceError("unauthorized", "this route needs 'Authorization: Bearer <token>'")
    scheme, _, token = authorization.partition(" ")
    # Constant-time comparison: the time taken says nothing about how much of the token matched.
    if scheme.lower() != "bearer" or not hmac.compare_digest(token.encode(), expected.get_secret_value().encode()):
        raise ServiceError("forbidden", "the bearer token is not valid for this route")


def require_admin(
    settings: Annotated[ServiceSettings, Depends(get_settings)],
    authorization: Annotated[str | None, Header(description=f"{_TOKEN_HEADER} with VEIL_ADMIN_TOKEN")] = None,
) -> None:
    if settings.admin_token is None:
        raise ServiceError("admin_disabled", "admin routes are off: no VEIL_ADMIN_TOKEN is configured")
    _check_bearer(authorization, settings.admin_token)


def require_data_token(
    settings: Annotated[ServiceSettings, Depends(get_settings)],
    authorization: Annotated[str | None, Header(description=f"{_TOKEN_HEADER}, if VEIL_DATA_TOKEN is set")] = None,
) -> None:
    if settings.data_token is not None:
        _check_bearer(authorization, settings.data_token)


async def read_body(request: Request, settings: Annotated[ServiceSettings, Depends(get_settings)]) -> bytes:
    """The request body, refused with 413 as soon as it passes the size limit (never read in full first)."""
    limit = settings.max_body_bytes
    declared = request.headers.get("content-length")
    if declared is not None and declared.isdigit() and int(declared) > limit:
        raise ServiceError("body_too_large", f"the body is {declared} bytes; the limit is {limit}")
    chunks, size = [], 0
    async for chunk in request.stream():
        size += len(chunk)
        if size > limit:
            raise ServiceError("body_too_large", f"the body is over the {limit}-byte limit")
        chunks.append(chunk)
    return b"".join(chunks)


def _media(value: str | None) -> str:
    return (value or "").split(";", 1)[0].strip().lower()


def request_format(
    content_type: Annotated[str | None, Header(description="application/json or application/x-npy")] = None,
) -> str:
    media = _media(content_type)
    if media not in (JSON_MEDIA_TYPE, NPY_MEDIA_TYPE):
        raise ServiceError(
            "unsupported_media_type", f"Content-Type {media or '(none)'} is not {JSON_MEDIA_TYPE} or {NPY_MEDIA_TYPE}"
        )
    return media


def response_format(
    request_media: Annotated[str, Depends(request_format)],
    accept: Annotated[str | None, Header(description="the response format; default: the request's")] = None,
) -> str:
    """The format named by ``Accept``; the request's own for ``*/*`` or no header."""
    if not accept:
        return request_media
    offered = [_media(part) for part in accept.split(",")]
    for media in offered:
        if media in (JSON_MEDIA_TYPE, NPY_MEDIA_TYPE):
            return media
        if media in ("*/*", "application/*"):
            return request_media
    raise ServiceError("not_acceptable", f"Accept {accept!r} names neither {JSON_MEDIA_TYPE} nor {NPY_MEDIA_TYPE}")


@dataclass(frozen=True)
class Pin:
    version: str | None
    alias: str | None


def version_pin(
    version: Annotated[str | None, Query(description="pin a version id or sequence number")] = None,
    alias: Annotated[str | None, Query(description="use another alias than the served one")] = None,
    x_veil_version: Annotated[str | None, Header(description="pin a version (as the query parameter)")] = None,
    x_veil_alias: Annotated[str | None, Header(description="use another alias (as the query parameter)")] = None,
) -> Pin:
    pinned_version = version or x_veil_version
    pinned_alias = alias or x_veil_alias
    if pinned_version and pinned_alias:
        raise ServiceError("invalid_request", "pin a version or an alias, not both")
    return Pin(version=pinned_version or None, alias=pinned_alias or None)
