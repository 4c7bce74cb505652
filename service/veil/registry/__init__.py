"""The versioned eraser registry with its formats: artifact files, version cards, aliases and history.

See :mod:`veil.registry.registry` for the layout and guarantees,
:mod:`veil.registry.artifact_files` for how an artifact is written, and
:mod:`veil.registry.card` for the card.

May import: ``veil.maps``, ``veil.audit`` (the report a card records),
``veil.checks`` (reference statistics and thresholds), ``veil.samples``,
``veil.errors``.  Never the fitting job, the reports, the service or the CLI.
"""

from veil.registry.errors import (
    AlertVerdictError,
    IntegrityError,
    InvalidReferenceError,
    LockTimeoutError,
    NotFoundError,
    PromotionError,
    RegistryError,
    RegistryLocationError,
)
from veil.registry.registry import (
    CARD_FILE,
    DEFAULT_ALIAS,
    SEAL_FILE,
    AliasState,
    HistoryEvent,
    Registry,
    StoredVersion,
    VerificationResult,
    VersionSummary,
    current_user,
)

__all__ = [
    "CARD_FILE",
    "DEFAULT_ALIAS",
    "SEAL_FILE",
    "AlertVerdictError",
    "AliasState",
    "HistoryEvent",
    "IntegrityError",
    "InvalidReferenceError",
    "LockTimeoutError",
    "NotFoundError",
    "PromotionError",
    "Registry",
    "RegistryError",
    "RegistryLocationError",
    "StoredVersion",
    "VerificationResult",
    "VersionSummary",
    "current_user",
]
