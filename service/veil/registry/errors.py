"""The registry's exceptions: one tree, so callers catch :class:`RegistryError` or a precise subclass."""

from __future__ import annotations


class RegistryError(Exception):
    """Base of every error the registry raises on purpose."""


class InvalidReferenceError(RegistryError, ValueError):
    """A name, alias or version id does not have the allowed form."""


class NotFoundError(RegistryError, LookupError):
    """The eraser name, version or alias does not exist."""


class IntegrityError(RegistryError):
    """A stored file is missing, damaged or does not match its checksum; the version is never served."""


class PromotionError(RegistryError):
    """A promote or rollback was refused (nothing to roll back to, a dimension change without the flag, ...)."""


class AlertVerdictError(PromotionError):
    """A promotion onto a version whose verdict is alert, refused because it was not forced."""


class LockTimeoutError(RegistryError, TimeoutError):
    """Another process held the eraser's lock for longer than the timeout."""


class RegistryLocationError(RegistryError, NotADirectoryError):
    """No registry can be at this location: its path is a file or lies under one, or its URL names a storage
    this installation cannot open (an unknown protocol, a backend that is not installed)."""
