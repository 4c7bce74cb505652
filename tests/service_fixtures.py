"""A registry the service tests share: real-sample erasers and a planted-data eraser, fitted once."""

from __future__ import annotations

import contextlib
from collections.abc import AsyncIterator
from pathlib import Path

import httpx
from fastapi import FastAPI

from reliability.workbench import (
    ADMIN_TOKEN,
    PLANTED,
    PROFILES,
    ServiceRegistry,
    build_registry,
    planted_population,
    sample_of,
)
from veil.server.app import create_app
from veil.server.settings import ServiceSettings

__all__ = [
    "ADMIN_TOKEN", "PLANTED", "PROFILES", "ServiceRegistry", "app_for", "build_registry", "client_for",
    "planted_population", "sample_of", "settings_for",
]  # fmt: skip


def settings_for(path: Path, **overrides: object) -> ServiceSettings:
    values: dict[str, object] = {"registry": str(path), "poll_seconds": 0, "admin_token": ADMIN_TOKEN, **overrides}
    return ServiceSettings.model_validate(values)


@contextlib.asynccontextmanager
async def client_for(app: FastAPI) -> AsyncIterator[httpx.AsyncClient]:
    """An httpx client on the app through ASGITransport, with the app's lifespan running."""
    async with app.router.lifespan_context(app):
        transport = httpx.ASGITransport(app=app)
        async with httpx.AsyncClient(transport=transport, base_url="http://veil.test") as client:
            yield client


def app_for(path: Path, **overrides: object) -> FastAPI:
    return create_app(settings_for(path, **overrides))
