"""The allowed forms of eraser names, alias names and version ids.

Every name that reaches a path is checked here first, so no name can climb
out of the registry (``../x``) or collide with its bookkeeping files.
"""

from __future__ import annotations

import re

from veil.registry.errors import InvalidReferenceError

_NAME = re.compile(r"^[a-z0-9](?:[a-z0-9_-]{0,62}[a-z0-9])?$")
_VERSION = re.compile(r"^v(\d{4,9})-([0-9a-f]{12})$")
_SEQUENCE = re.compile(r"^v?(\d{1,9})$")
HASH_LENGTH = 12


def check_name(value: str, *, what: str = "eraser name") -> str:
    """Return ``value`` if it is a valid eraser or alias name: lowercase letters, digits, ``-`` and ``_``."""
    if not isinstance(value, str) or not _NAME.fullmatch(value):
        raise InvalidReferenceError(
            f"invalid {what} {value!r}: use 1-64 lowercase letters, digits, '-' or '_', "
            "starting and ending with a letter or digit"
        )
    return value


def format_version_id(sequence: int, content_hash: str) -> str:
    """``v0003-3fa9c2e1b7d4``: a sequence number people can say, and the start of the content hash."""
    return f"v{sequence:04d}-{content_hash[:HASH_LENGTH]}"


def parse_version_id(value: str) -> tuple[int, str] | None:
    """``(sequence, hash prefix)`` of a full version id, or None if ``value`` is not one."""
    match = _VERSION.fullmatch(value) if isinstance(value, str) else None
    return None if match is None else (int(match.group(1)), match.group(2))


def parse_sequence(value: str) -> int | None:
    """The sequence number of a short reference such as ``3`` or ``v3``, or None."""
    match = _SEQUENCE.fullmatch(value) if isinstance(value, str) else None
    return None if match is None else int(match.group(1))
