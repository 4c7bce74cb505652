"""A registry the service tests share: real-sample erasers and a planted-data eraser, fitted once."""

from __future__ import annotations

import contextlib
from collections.abc import AsyncIterator
from dataclasses import dataclass
from pathlib import Path

import httpx
import numpy as np
from fastapi import FastAPI
from numpy.typing import NDArray

from veil.datasets import load_harbourline_profiles
from veil.datasource import LabelledSample
from veil.fitting import fit_version
from veil.registry import Registry
from veil.server.app import create_app
from veil.server.settings import ServiceSettings

PROFILES = "profiles-minilm"
PLANTED = "planted"
ADMIN_TOKEN = "s3cret-admin-token"


def planted_population(n: int, *, seed: int, d: int = 16) -> tuple[NDArray[np.float32], NDArray[np.str_]]:
    """One fixed Gaussian population (the same mixing for every seed) with a binary attribute planted in it."""
    structure = np.random.default_rng(12345)
    mixing = structure.normal(size=(d, d)) / np.sqrt(d)
    direction = structure.normal(size=d)
    rng = np.random.default_rng(seed)
    z = rng.integers(0, 2, n)
    x = rng.normal(size=(n, d)) @ mixing + np.outer(z, direction)
    return x.astype(np.float32), np.array(["north", "south"])[z]


def sample_of(
    x: NDArray[np.floating], z: NDArray[np.str_], key: str, task: NDArray[np.str_] | None = None
) -> LabelledSample:
    return LabelledSample(
        embeddings=x, attribute=z, attribute_key=key, task=task, task_key=None if task is None else "task",
        files={key: "0" * 64},
    )  # fmt: skip


@dataclass(frozen=True)
class ServiceRegistry:
    path: Path
    leace: str
    meanproj: str
    planted: str


def build_registry(path: Path) -> ServiceRegistry:
    registry = Registry(path)
    profiles = load_harbourline_profiles()
    sample = sample_of(profiles.embedding, profiles.pronoun, "pronoun")
    leace = fit_version(sample, registry=registry, name=PROFILES, method="leace", nonlinear=False, alias="live")
    meanproj = fit_version(sample, registry=registry, name=PROFILES, method="meanproj", nonlinear=False)
    x, z = planted_population(20000, seed=1)
    planted = fit_version(
        sample_of(x, z, "region"), registry=registry, name=PLANTED, method="leace", nonlinear=False, alias="live"
    )
    return ServiceRegistry(path, leace.version_id, meanproj.version_id, planted.version_id)


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
