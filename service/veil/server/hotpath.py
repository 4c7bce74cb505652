"""``POST /v1/erasers/{name}/apply`` straight to its route function, past FastAPI's router and dependencies.

Search traffic is mostly one query vector per request, and at one vector
FastAPI's work around the route (matching the path against every route,
solving the dependencies, validating the ``{name}`` parameter with pydantic)
cost more than reading, erasing and writing the vector (``docs/performance.md``).
The apply route takes only its name and the raw request and reads everything
else by hand, so calling it directly is the same call: this middleware
recognises the route's method and path, sets the scope keys the router would
set (the route, for metrics and logs; the path parameter), and awaits the
route's own function.  Its refusals become the same JSON errors as on every
other route; anything unexpected propagates to the same 500 handler.  Every
other request, and the OpenAPI schema, goes through FastAPI as before.
"""

from __future__ import annotations

from collections.abc import Awaitable, Callable

from fastapi.routing import APIRoute
from starlette.requests import Request
from starlette.responses import Response
from starlette.types import ASGIApp, Receive, Scope, Send

from veil.server.errors import ServiceError, error_response

_PREFIX = "/v1/erasers/"
_SUFFIX = "/apply"


class ApplyHotPath:
    """Serve ``POST {_PREFIX}{name}{_SUFFIX}`` with ``route``'s endpoint; pass everything else on."""

    def __init__(self, app: ASGIApp, route: APIRoute) -> None:
        if route.path != _PREFIX + "{name}" + _SUFFIX or route.methods != {"POST"}:
            raise ValueError(f"the hot path serves POST {_PREFIX}{{name}}{_SUFFIX}, not {route.methods} {route.path}")
        self.app = app
        self.route = route
        self.endpoint: Callable[[str, Request], Awaitable[Response]] = route.endpoint

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        name = self._name(scope)
        if name is None:
            await self.app(scope, receive, send)
            return
        scope["route"] = self.route
        scope["path_params"] = {"name": name}
        try:
            response = await self.endpoint(name, Request(scope, receive))
        except ServiceError as error:
            response = error_response(error.code, error.message, details=error.details)
        await response(scope, receive, send)

    @staticmethod
    def _name(scope: Scope) -> str | None:
        """The ``{name}`` of an apply request, as the router would match it (``[^/]+``), else None."""
        if scope["type"] != "http" or scope["method"] != "POST" or scope.get("root_path"):
            return None
        path: str = scope["path"]
        if not (path.startswith(_PREFIX) and path.endswith(_SUFFIX)):
            return None
        name = path[len(_PREFIX) : -len(_SUFFIX)]
        return name if name and "/" not in name else None
