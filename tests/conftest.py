"""Shared data for the tests: bundled scikit-learn sets, a planted synthetic set, the committed sample."""

from __future__ import annotations

import os

# Fits that do not test the live checks' calibration skip its draws (a cross-validated probe each): they keep the
# fixed levels, as a version stored before calibration does.  Set before veil is imported, which reads it.
os.environ.setdefault("VEIL_LIVE_DRAWS", "0")

from dataclasses import dataclass

import numpy as np
import pytest
from numpy.typing import NDArray
from sklearn.datasets import load_breast_cancer, load_wine
from sklearn.model_selection import train_test_split
from sklearn.preprocessing import StandardScaler

from veil.samples.harbourline import load_harbourline_profiles

from .service_fixtures import ServiceRegistry, build_registry


@dataclass(frozen=True)
class Split:
    """A fitting split and a held-out split of one data set (the attribute is ``z``)."""

    name: str
    x_fit: NDArray[np.floating]
    z_fit: NDArray[np.generic]
    x_held: NDArray[np.floating]
    z_held: NDArray[np.generic]


def planted(n: int = 6000, d: int = 16, seed: int = 0) -> tuple[NDArray[np.float64], NDArray[np.int64]]:
    """Gaussian data with a binary attribute planted along one direction, plus correlated noise."""
    rng = np.random.default_rng(seed)
    z = rng.integers(0, 2, n)
    mixing = rng.normal(size=(d, d)) / np.sqrt(d)
    x = rng.normal(size=(n, d)) @ mixing + np.outer(z, rng.normal(size=d))
    return x, z


def _tabular_split(name: str, x: NDArray[np.float64], z: NDArray[np.int64]) -> Split:
    x_fit, x_held, z_fit, z_held = train_test_split(x, z, test_size=0.5, random_state=0, stratify=z)
    # Tabular features come in wildly different units (areas in the
    # thousands, ratios below one); standardising them first is common
    # practice, and erasure then works in comparable units.
    scaler = StandardScaler().fit(x_fit)
    return Split(name, scaler.transform(x_fit), z_fit, scaler.transform(x_held), z_held)


@pytest.fixture(scope="session")
def profiles() -> Split:
    sample = load_harbourline_profiles()
    x_fit, x_held, z_fit, z_held = train_test_split(
        sample.embedding, sample.pronoun, test_size=0.3, random_state=0, stratify=sample.pronoun
    )
    return Split("harbourline", x_fit, z_fit, x_held, z_held)


@pytest.fixture(scope="session")
def breast_cancer() -> Split:
    x, z = load_breast_cancer(return_X_y=True)
    return _tabular_split("breast_cancer", x, z)


@pytest.fixture(scope="session")
def wine() -> Split:
    x, z = load_wine(return_X_y=True)
    return _tabular_split("wine", x, z)


@pytest.fixture(scope="session")
def planted_split() -> Split:
    x, z = planted()
    return _tabular_split("planted", x, z)


@pytest.fixture(scope="session")
def service_registry(tmp_path_factory: pytest.TempPathFactory) -> ServiceRegistry:
    """Real-sample LEACE (live) and mean-projection versions, and a planted-data LEACE, fitted once."""
    return build_registry(tmp_path_factory.mktemp("service") / "registry")


@pytest.fixture
def anyio_backend() -> str:
    return "asyncio"
