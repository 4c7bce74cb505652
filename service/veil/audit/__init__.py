"""The leakage and utility audit of a fitted eraser on held-out data, or of a stored map on a fresh sample.

May import: ``veil.erasers``, ``veil.maps``, ``veil.samples``, ``veil.errors``, ``veil.progress``.
Never the registry, the live checks, the fitting job or the service.
"""

from __future__ import annotations

import importlib
from typing import TYPE_CHECKING, Any

from veil.audit.report import (
    AuditReport,
    Leakage,
    ProbeProtocol,
    ProbeScore,
    RankingFairness,
    RegressionScore,
    Retrieval,
    Utility,
)

if TYPE_CHECKING:
    from veil.audit.run import audit, audit_artifact, fit_and_audit

__all__ = [
    "AuditReport",
    "Leakage",
    "ProbeProtocol",
    "ProbeScore",
    "RankingFairness",
    "RegressionScore",
    "Retrieval",
    "Utility",
    "audit",
    "audit_artifact",
    "fit_and_audit",
]

# Running an audit needs scikit-learn; reading one (a version card) does not, so the runner loads on first use.
_LAZY = {"audit": "veil.audit.run", "audit_artifact": "veil.audit.run", "fit_and_audit": "veil.audit.run"}


def __getattr__(name: str) -> Any:
    module = _LAZY.get(name)
    if module is None:
        raise AttributeError(f"module 'veil.audit' has no attribute {name!r}")
    value = getattr(importlib.import_module(module), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted({*globals(), *_LAZY})
