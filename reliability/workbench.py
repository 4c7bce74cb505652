"""The registry every reliability check serves: two versions of a real-sample eraser and one on planted data."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
from numpy.typing import NDArray

from veil.fitting.job import fit_version
from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, StoreSpec
from veil.registry import Registry
from veil.samples.harbourline import load_harbourline_profiles
from veil.samples.sources import LabelledSample

PROFILES = "profiles-minilm"
PLANTED = "planted"
PLANTED_DIM = 16
ALIAS = "live"
#: The admin token of the servers the checks start (a test value, never a real secret).
ADMIN_TOKEN = "s3cret-admin-token"


def planted_population(n: int, *, seed: int, d: int = PLANTED_DIM) -> tuple[NDArray[np.float32], NDArray[np.str_]]:
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
    """Where the registry is, and the ids of its versions (``leace`` is live for profiles-minilm)."""

    path: Path
    leace: str
    meanproj: str
    planted: str


def build_registry(path: Path) -> ServiceRegistry:
    """Fit and store the versions (a few seconds): LEACE and mean projection on the committed sample, LEACE planted."""
    registry = Registry(path)
    profiles = load_harbourline_profiles()
    sample = sample_of(profiles.embedding, profiles.pronoun, "pronoun")
    linear_only = AuditSpec(nonlinear=False)
    leace = fit_version(
        sample, FitRequest(MethodSpec("leace"), StoreSpec(PROFILES, alias=ALIAS), audit=linear_only), registry=registry
    )
    meanproj = fit_version(
        sample, FitRequest(MethodSpec("meanproj"), StoreSpec(PROFILES), audit=linear_only), registry=registry
    )
    x, z = planted_population(20000, seed=1)
    planted = fit_version(
        sample_of(x, z, "region"),
        FitRequest(MethodSpec("leace"), StoreSpec(PLANTED, alias=ALIAS), audit=linear_only),
        registry=registry,
    )
    return ServiceRegistry(path, leace.version_id, meanproj.version_id, planted.version_id)
