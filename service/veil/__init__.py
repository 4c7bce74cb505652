"""veil: keep a protected attribute out of embeddings, and show that it stays out."""

from __future__ import annotations

import importlib
from importlib import metadata
from typing import TYPE_CHECKING, Any

from veil.maps.artifact import MapArtifact
from veil.maps.lowrank import AffineLowRankMap
from veil.maps.moments import MomentState
from veil.maps.search import SearchVectors, search_vectors
from veil.samples.attributes import attribute_table
from veil.samples.embedding_model import EmbeddingModel

if TYPE_CHECKING:
    from veil.erasers import INLP, LEACE, RLACE, MeanProjection
    from veil.erasers.transport import GaussianTransport
    from veil.fitting.job import fit_version
    from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, ReadingSpec, StoreSpec

# The one version number is the distribution's (pyproject.toml).
__version__ = metadata.version("veil")

__all__ = [
    "INLP",
    "LEACE",
    "RLACE",
    "AffineLowRankMap",
    "AuditSpec",
    "EmbeddingModel",
    "FitRequest",
    "GaussianTransport",
    "MapArtifact",
    "MeanProjection",
    "MethodSpec",
    "MomentState",
    "ReadingSpec",
    "SearchVectors",
    "StoreSpec",
    "__version__",
    "attribute_table",
    "fit_version",
    "search_vectors",
]

# The estimators and the fitting job import scikit-learn (about a second): they load on first use, so that
# `import veil` (and every `veil` command that fits nothing) stays fast.
_LAZY = {
    "INLP": "veil.erasers",
    "LEACE": "veil.erasers",
    "RLACE": "veil.erasers",
    "MeanProjection": "veil.erasers",
    "GaussianTransport": "veil.erasers.transport",
    "fit_version": "veil.fitting.job",
    "FitRequest": "veil.fitting.request",
    "MethodSpec": "veil.fitting.request",
    "AuditSpec": "veil.fitting.request",
    "StoreSpec": "veil.fitting.request",
    "ReadingSpec": "veil.fitting.request",
}


def __getattr__(name: str) -> Any:
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'veil' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted({*globals(), *_LAZY})
