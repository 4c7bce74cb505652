"""The versioned eraser registry (see :mod:`veil.registry.registry` for the layout and guarantees)."""

from veil.registry.errors import (
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
