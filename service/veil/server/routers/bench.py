"""``POST /v1/bench/echo``: the body back, untouched; mounted only with ``VEIL_BENCHMARK_ECHO=true``.

It is the floor ``make bench`` measures the apply route against: the same
server, the same payload, the same body reading, everything but parsing,
erasing and serialising.
"""

from __future__ import annotations

from fastapi import APIRouter, Request
from starlette.responses import Response

from veil.server.dependencies import read_body

router = APIRouter(prefix="/v1/bench", tags=["benchmark"], include_in_schema=False)


@router.post("/echo")
async def echo(request: Request) -> Response:
    # Read like the batch routes read (size limit included), answer the bytes back.
    body = await read_body(request, request.app.state.settings.max_body_bytes)
    return Response(body, media_type=request.headers.get("content-type") or "application/octet-stream")
