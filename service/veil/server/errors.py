"""The service's error responses: JSON ``{"error": {"code", "message"}}`` with a stable code per problem.

Every failure a caller can cause maps to a 4xx with one of the codes below;
none reaches the client as a 500 with a traceback.
"""

from __future__ import annotations

import logging
from collections.abc import Mapping
from typing import Any

import orjson
from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.responses import Response

logger = logging.getLogger("veil.server")

#: code -> (status, meaning); documented in docs/service.md.
ERROR_CODES: dict[str, tuple[int, str]] = {
    "malformed_body": (400, "the body is not valid JSON or not a valid .npy array"),
    "unauthorized": (401, "this route needs a bearer token"),
    "forbidden": (403, "the bearer token is wrong"),
    "admin_disabled": (403, "no admin token is configured, so admin routes are off"),
    "not_found": (404, "no such route"),
    "unknown_eraser": (404, "this eraser is not served"),
    "unknown_version": (404, "no such version or alias of this eraser"),
    "method_not_allowed": (405, "the route does not take this method"),
    "not_acceptable": (406, "the Accept header names no format the service writes"),
    "no_traffic": (409, "this replica has seen no traffic for the eraser yet"),
    "embedding_model_mismatch": (
        409,
        "the request's X-Veil-Embedding-Model differs from the model the version was fitted on (both named; the "
        "error's `stated` and `recorded` fields hold them)",
    ),
    "body_too_large": (413, "the body is over the size limit"),
    "unsupported_media_type": (415, "send application/json or application/x-npy"),
    "invalid_vectors": (422, "the vectors are not a non-empty 2-D batch of finite numbers"),
    "wrong_dimension": (422, "the vectors' dimension differs from the eraser's"),
    "invalid_request": (422, "a parameter or field is missing or invalid"),
    "unknown_class": (422, "the target is not a class of the attribute"),
    "inexact_search": (422, "an exact answer was asked for, and this version and index metric cannot give one"),
    "internal_error": (500, "a fault inside the service (logged); not caused by the request"),
    "version_unavailable": (503, "the version could not be loaded or failed verification"),
    "not_ready": (503, "not every configured eraser is loaded"),
}


def error_responses(*codes: str) -> dict[int | str, dict[str, Any]]:
    """The OpenAPI ``responses`` entries of these error codes (and ``internal_error``), grouped by status.

    Each status documents exactly the codes a route can answer with it, so a
    schema-driven fuzzer can tell a documented refusal from a surprise.
    """
    by_status: dict[int, list[str]] = {}
    for code in (*codes, "internal_error"):
        by_status.setdefault(ERROR_CODES[code][0], []).append(code)
    responses: dict[int | str, dict[str, Any]] = {}
    for status, group in sorted(by_status.items()):
        error = {
            "type": "object",
            "required": ["code", "message"],
            "properties": {"code": {"type": "string", "enum": group}, "message": {"type": "string"}},
        }
        responses[status] = {
            "description": "; ".join(f"`{code}`: {ERROR_CODES[code][1]}" for code in group),
            "content": {
                "application/json": {
                    "schema": {"type": "object", "required": ["error"], "properties": {"error": error}}
                }
            },
        }
    return responses


class ServiceError(Exception):
    """A failure with a code from :data:`ERROR_CODES`, a message for people, and any fields for programs."""

    def __init__(self, code: str, message: str, details: Mapping[str, str] | None = None) -> None:
        super().__init__(message)
        self.code = code
        self.status = ERROR_CODES[code][0]
        self.message = message
        self.details = dict(details or {})


def error_response(
    code: str, message: str, status: int | None = None, details: Mapping[str, str] | None = None
) -> Response:
    """The JSON error; ``details`` are further fields of the error object beside its code and message."""
    body = orjson.dumps({"error": {**(details or {}), "code": code, "message": message}})
    return Response(body, status_code=status or ERROR_CODES[code][0], media_type="application/json")


_HTTP_CODES = {404: "not_found", 405: "method_not_allowed", 401: "unauthorized", 403: "forbidden"}


def install_error_handlers(app: FastAPI) -> None:
    @app.exception_handler(ServiceError)
    async def service_error(request: Request, error: ServiceError) -> Response:
        return error_response(error.code, error.message, details=error.details)

    @app.exception_handler(RequestValidationError)
    async def validation_error(request: Request, error: RequestValidationError) -> Response:
        problems = "; ".join(
            f"{'.'.join(str(part) for part in e.get('loc', ()))}: {e.get('msg', 'invalid')}" for e in error.errors()[:5]
        )
        return error_response("invalid_request", problems or "invalid request")

    @app.exception_handler(StarletteHTTPException)
    async def http_error(request: Request, error: StarletteHTTPException) -> Response:
        code = _HTTP_CODES.get(error.status_code, "invalid_request")
        return error_response(code, str(error.detail), status=error.status_code)

    @app.exception_handler(Exception)
    async def unexpected(request: Request, error: Exception) -> Response:
        # Logged with its type only: messages may quote request content.
        logger.error("unexpected failure", extra={"fields": {"error": type(error).__name__, "path": request.url.path}})
        return error_response("internal_error", "the service could not complete the request")
