"""``veil serve``: settings from the command line on top of ``VEIL_...`` variables, then uvicorn."""

from __future__ import annotations

import json
import os
from typing import Any, Literal

import uvicorn

from veil.registry.naming import check_name
from veil.registry.storage import open_storage
from veil.server.settings import load_settings

#: The HTTP stacks ``veil serve --http`` can run: httptools' C parser on uvloop (the default), or pure Python.
HttpStack = Literal["httptools", "h11"]
HTTP_STACKS: tuple[HttpStack, ...] = ("httptools", "h11")


def uvicorn_options(http: HttpStack) -> dict[str, Any]:
    """The uvicorn settings of one HTTP stack; ``make bench`` serves its bare baseline app with the same ones.

    ``httptools`` parses HTTP in C and runs on uvloop; ``h11`` is uvicorn's
    pure-Python parser on asyncio's own loop, for platforms without those
    wheels.  Both protocols set ``TCP_NODELAY`` on every connection.
    """
    if http not in HTTP_STACKS:
        raise ValueError(f"unknown HTTP stack {http!r}; choose from {', '.join(HTTP_STACKS)}")
    fast = http == "httptools"
    return {
        "http": "veil.server.protocol:NoDelayHttpToolsProtocol" if fast else "veil.server.protocol:NoDelayH11Protocol",
        "loop": "uvloop" if fast else "asyncio",
        "ws": "none",
        "access_log": False,  # the service writes its own JSON line per request
    }


def serve_forever(
    *, registry: str, names: list[str], alias: str, host: str, port: int, workers: int, http: HttpStack = "httptools"
) -> None:
    """Run the service until interrupted; with ``workers > 1``, each worker process builds its own app."""
    for name in names:
        check_name(name)
    check_name(alias, what="alias")
    # A URL no storage can open is refused here, in one line; a registry that does not exist yet is served
    # (and /readyz says why nothing is loaded) until it appears.
    open_storage(registry)
    # Through the environment, so every worker process the factory starts gets the same settings.
    os.environ["VEIL_REGISTRY"] = registry
    os.environ["VEIL_ALIAS"] = alias
    if names:
        os.environ["VEIL_NAMES"] = json.dumps(names)
    settings = load_settings()
    uvicorn.run(
        "veil.server.app:create_app",
        factory=True,
        host=host,
        port=port,
        workers=workers,
        log_level=settings.log_level,
        **uvicorn_options(http),
    )
