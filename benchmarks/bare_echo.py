"""The floor of ``make bench``'s service rows: a bare FastAPI app whose one route echoes the body.

``python benchmarks/bare_echo.py PORT HTTP`` serves it on ``127.0.0.1:PORT`` with the uvicorn settings
``veil serve --http HTTP`` uses (:func:`veil.server.run.uvicorn_options`: the same protocol class, event loop,
one worker, no access log).  No middleware, metrics, logging or dependencies: what remains is uvicorn,
Starlette's routing and FastAPI's request handling, which every route of the service pays too.
"""

from __future__ import annotations

import sys

import uvicorn
from fastapi import FastAPI, Request
from starlette.responses import Response

from veil.server.run import uvicorn_options

app = FastAPI()


@app.post("/echo")
async def echo(request: Request) -> Response:
    return Response(await request.body(), media_type=request.headers.get("content-type"))


if __name__ == "__main__":
    port, http = sys.argv[1:]
    uvicorn.run(app, host="127.0.0.1", port=int(port), log_level="warning", **uvicorn_options(http))  # type: ignore[arg-type]
