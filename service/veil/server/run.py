"""``veil serve``: settings from the command line on top of ``VEIL_...`` variables, then uvicorn."""

from __future__ import annotations

import json
import os

import uvicorn

from veil.registry.naming import check_name
from veil.registry.storage import open_storage
from veil.server.settings import load_settings


def serve_forever(*, registry: str, names: list[str], alias: str, host: str, port: int, workers: int) -> None:
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
        http="veil.server.protocol:NoDelayH11Protocol",
        log_level=settings.log_level,
        access_log=False,  # the service writes its own JSON line per request
    )
