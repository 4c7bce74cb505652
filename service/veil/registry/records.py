"""Append-only, checksummed records about a stored version: its fresh audits and its recorded live checks.

Layout under the registry root::

    <name>/records/<version id>/<kind>/<number>-<key>.json

A record is written whole in one step (``Storage.create_once``: a complete
file appears, or nothing), so a writer killed mid-append leaves no partial
record, and nothing is ever rewritten.  Appends to one log hold its lock
(``<kind>.lock`` beside the folder), so concurrent writers take distinct
numbers and never store one key twice.  Records live beside the version,
never inside it: the version's files, seal and content hash do not change.
``key`` names the record's content (the sha256 of its body, by default), so
appending the same record again returns the one stored: retries are
idempotent.  Each file holds its body's sha256; reading verifies it.
"""

from __future__ import annotations

import hashlib
import json
import re
from dataclasses import dataclass
from typing import Any

from veil.registry.errors import IntegrityError
from veil.registry.storage import Storage

RECORD_FORMAT = 1
LOCK_TIMEOUT_SECONDS = 30.0
KINDS = ("audits", "checks")
_NUMBER_DIGITS = 8
_KEY = re.compile(r"^[0-9a-f]{16}$")
_FILE = re.compile(r"^(?P<number>\d{8})-(?P<key>[0-9a-f]{16})\.json$")


@dataclass(frozen=True)
class Record:
    """One stored record: its place in the version's log, its key and its body."""

    kind: str
    version: str
    number: int
    key: str
    body: dict[str, Any]


def _canonical(body: dict[str, Any]) -> bytes:
    try:
        return json.dumps(body, sort_keys=True, separators=(",", ":"), allow_nan=False).encode()
    except ValueError as error:
        raise ValueError(f"a record must be finite JSON ({error})") from None


def content_key(body: dict[str, Any]) -> str:
    """The default key of a record: the first 16 hex digits of its body's sha256."""
    return hashlib.sha256(_canonical(body)).hexdigest()[:16]


def _directory(name: str, version_id: str, kind: str) -> str:
    if kind not in KINDS:
        raise ValueError(f"unknown record kind {kind!r}; known: {', '.join(KINDS)}")
    return f"{name}/records/{version_id}/{kind}"


def _entries(storage: Storage, directory: str) -> list[tuple[int, str, str]]:
    """``(number, key, file name)`` of every record file, in order; a writer's leftover temporary file is not one."""
    found = []
    for entry in storage.list(directory):
        match = _FILE.match(entry)
        if match is not None:
            found.append((int(match["number"]), match["key"], entry))
    return sorted(found)


def _read(storage: Storage, name: str, version_id: str, kind: str, entry: str) -> Record:
    where = f"{name} {version_id}: {kind} record {entry}"
    try:
        stored = json.loads(storage.read(f"{_directory(name, version_id, kind)}/{entry}"))
        body = stored["body"]
        digest = stored["sha256"]
        number = int(stored["number"])
        key = str(stored["key"])
    except (ValueError, KeyError, TypeError) as error:
        raise IntegrityError(f"{where} is unreadable ({error})") from None
    if not isinstance(body, dict) or hashlib.sha256(_canonical(body)).hexdigest() != digest:
        raise IntegrityError(f"{where} does not match its sha256 (damaged or changed)")
    if entry != f"{number:0{_NUMBER_DIGITS}d}-{key}.json":
        raise IntegrityError(f"{where} names another place in the log ({number}, {key})")
    return Record(kind=kind, version=version_id, number=number, key=key, body=body)


def append_record(
    storage: Storage, name: str, version_id: str, kind: str, body: dict[str, Any], *, key: str | None = None
) -> Record:
    """Append ``body`` to the version's log of ``kind``; the stored record if one with ``key`` is there already.

    Appends to one log are serialised by a lock beside it (released by the
    kernel if the writer dies; a lease on object stores), so a key is never
    stored twice and a number never taken twice, whatever runs at once.
    """
    directory = _directory(name, version_id, kind)
    canonical = _canonical(body)
    key = content_key(body) if key is None else key
    if not _KEY.match(key):
        raise ValueError(f"a record key is 16 lower-case hex digits, got {key!r}")
    with storage.lock(f"{directory}.lock", timeout=LOCK_TIMEOUT_SECONDS):
        entries = _entries(storage, directory)
        for _, existing, entry in entries:
            if existing == key:
                return _read(storage, name, version_id, kind, entry)
        number = 1 + max((number for number, _, _ in entries), default=0)
        stored = {
            "record_format": RECORD_FORMAT,
            "kind": kind,
            "version": version_id,
            "number": number,
            "key": key,
            "sha256": hashlib.sha256(canonical).hexdigest(),
            "body": body,
        }
        data = json.dumps(stored, indent=2, sort_keys=True).encode()
        if not storage.create_once(f"{directory}/{number:0{_NUMBER_DIGITS}d}-{key}.json", data):
            raise IntegrityError(f"{name} {version_id}: {kind} record {number} appeared while the log was locked")
    return Record(kind=kind, version=version_id, number=number, key=key, body=body)


def find_record(storage: Storage, name: str, version_id: str, kind: str, key: str) -> Record | None:
    """The version's record of ``kind`` with ``key`` (verified), or None; no other record is read."""
    for _, existing, entry in _entries(storage, _directory(name, version_id, kind)):
        if existing == key:
            return _read(storage, name, version_id, kind, entry)
    return None


def read_records(storage: Storage, name: str, version_id: str, kind: str) -> list[Record]:
    """The version's records of ``kind``, in order, each verified; raises :class:`IntegrityError` on a bad one."""
    directory = _directory(name, version_id, kind)
    return [_read(storage, name, version_id, kind, entry) for _, _, entry in _entries(storage, directory)]
