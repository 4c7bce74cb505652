"""The versioned eraser registry: immutable versions, aliases that point at them, and a history of every move.

Layout under the registry root (a directory or an fsspec URL)::

    <name>/versions/<version id>/   the version's files; checksums.json (the seal) last
    <name>/aliases/<alias>.json     {"alias", "version", "event", "dim"}
    <name>/history/<event>.json     one file per promote or rollback, numbered 00000001, 00000002, ...
    <name>/records/<version id>/    append-only records about the version (fresh audits), see veil.registry.records
    <name>/lock                     serialises promotes, rollbacks and new sequence numbers

A version id is ``v<sequence>-<hash>``: the hash is the sha256 of the
version's file checksums, so the id names the content and verifying a
version recomputes it.  History events are written before the alias they
move (an intent log): if a writer dies between the two, the alias still
names its old, complete target, and the next writer finishes the move.
"""

from __future__ import annotations

import getpass
import hashlib
import json
import os
from collections.abc import Callable, Iterator, Mapping
from contextlib import AbstractContextManager
from dataclasses import asdict, dataclass
from datetime import UTC, datetime
from typing import Any

from veil.maps.artifact import MapArtifact
from veil.registry.artifact_files import ArtifactFormatError, decode_artifact
from veil.registry.card import promotion_verdict
from veil.registry.errors import (
    AlertVerdictError,
    IntegrityError,
    InvalidReferenceError,
    NotFoundError,
    PromotionError,
)
from veil.registry.naming import check_name, format_version_id, parse_sequence, parse_version_id
from veil.registry.records import KINDS, Record, append_record, find_record, read_records
from veil.registry.storage import Storage, open_storage

CARD_FILE = "card.json"
SEAL_FILE = "checksums.json"
DEFAULT_ALIAS = "live"
LOCK_TIMEOUT_SECONDS = 30.0
_EVENT_DIGITS = 8


def current_user() -> str:
    """Who is acting: ``VEIL_USER`` if set (CI jobs set it), else the login name."""
    return os.environ.get("VEIL_USER") or getpass.getuser()


def _now() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


def _checksums(files: Mapping[str, bytes]) -> dict[str, dict[str, Any]]:
    return {
        name: {"sha256": hashlib.sha256(data).hexdigest(), "bytes": len(data)} for name, data in sorted(files.items())
    }


def _content_hash(checksums: Mapping[str, Mapping[str, Any]]) -> str:
    return hashlib.sha256(json.dumps(checksums, sort_keys=True).encode()).hexdigest()


@dataclass(frozen=True)
class VersionSummary:
    """One line of ``veil versions``."""

    id: str
    sequence: int
    created_at: str
    created_by: str
    method: str
    dim: int
    rank: int
    #: Why the version's card cannot be read (listed all the same, as damaged); None for a sound card.
    problem: str | None = None


@dataclass(frozen=True, eq=False)
class StoredVersion:
    """A version read back and verified: its files, its card and its eraser."""

    name: str
    id: str
    files: Mapping[str, bytes]
    card: Mapping[str, Any]
    artifact: MapArtifact


@dataclass(frozen=True)
class AliasState:
    alias: str
    version: str
    event: int
    dim: int


@dataclass(frozen=True)
class HistoryEvent:
    """One promote, rollback or removal of an alias (``to_version`` None); ``applied`` is False only for a move a
    crashed writer left unfinished.  ``forced``: a promote onto a version whose verdict is alert, with the
    reason it was forced (events written before promotions were judged hold False)."""

    event: int
    time: str
    user: str
    alias: str
    action: str
    from_version: str | None
    to_version: str | None
    reason: str
    applied: bool = True
    forced: bool = False

    def to_dict(self) -> dict[str, Any]:
        data = asdict(self)
        data.pop("applied")
        return data


@dataclass(frozen=True)
class VerificationResult:
    name: str
    version: str
    ok: bool
    problem: str | None = None


class Registry:
    """Versions, aliases and history of named erasers, on a local directory or an fsspec URL.

    Parameters
    ----------
    url : str or path-like
        A directory (created on first write) or a URL such as ``memory://reg``
        or ``s3://bucket/veil``.
    storage : Storage, optional
        Use this backend instead of opening ``url``.
    """

    def __init__(self, url: str | os.PathLike[str], *, storage: Storage | None = None) -> None:
        self.storage = storage if storage is not None else open_storage(url)
        self.url = self.storage.url

    # ----------------------------------------------------------------- reading

    def problem(self) -> str | None:
        """Why nothing at all can be read here (missing, not a directory, refused), naming the registry; else None.

        Writers create a missing registry on first write, so readers that list
        it see it as empty; a service needs to tell that apart from one that is empty.
        """
        try:
            if not self.storage.exists(""):
                return f"the registry {self.url} does not exist"
            self.storage.list("")
        except NotADirectoryError:
            return f"the registry {self.url} is not a directory"
        except OSError as error:
            return f"the registry {self.url} cannot be read ({error.strerror or error})"
        return None

    def names(self) -> list[str]:
        """Every eraser name with at least one visible version."""
        return [name for name in self.storage.list("") if self._is_name(name) and self._version_ids(name)]

    @staticmethod
    def _is_name(value: str) -> bool:
        try:
            check_name(value)
        except InvalidReferenceError:
            return False
        return True

    def _version_ids(self, name: str) -> list[str]:
        found = []
        for entry in self.storage.list(f"{name}/versions"):
            parsed = parse_version_id(entry)
            # Without its seal a version is still being written, or its writer died: it is not there.
            if parsed is not None and self.storage.exists(f"{name}/versions/{entry}/{SEAL_FILE}"):
                found.append((parsed[0], entry))
        return [entry for _, entry in sorted(found)]

    def _require_name(self, name: str) -> list[str]:
        check_name(name)
        ids = self._version_ids(name)
        if not ids:
            raise NotFoundError(f"no eraser named {name!r} in the registry {self.url}")
        return ids

    def versions(self, name: str) -> list[VersionSummary]:
        """The visible versions of ``name``, oldest first (cards read, not verified; a damaged card says why)."""
        summaries = []
        for version_id in self._require_name(name):
            sequence = int(version_id[1:].split("-")[0])
            try:
                card = self._read_card(name, version_id)
            except IntegrityError as error:
                summaries.append(VersionSummary(version_id, sequence, "", "", "", 0, 0, problem=str(error)))
                continue
            summaries.append(
                VersionSummary(
                    id=version_id,
                    sequence=sequence,
                    created_at=str(card.get("created_at", "")),
                    created_by=str(card.get("created_by", "")),
                    method=str(card.get("method", "")),
                    dim=int(card.get("dim", 0)),
                    rank=int(card.get("rank", 0)),
                )
            )
        return summaries

    def _read_card(self, name: str, version_id: str) -> dict[str, Any]:
        try:
            card = json.loads(self.storage.read(f"{name}/versions/{version_id}/{CARD_FILE}"))
        except (FileNotFoundError, ValueError) as error:
            raise IntegrityError(f"{name} {version_id}: the card is missing or unreadable ({error})") from None
        if not isinstance(card, dict):
            raise IntegrityError(f"{name} {version_id}: the card is not a JSON object")
        return card

    def resolve(self, name: str, reference: str) -> str:
        """The full version id ``reference`` stands for: a full id, a sequence (``3``, ``v3``) or an alias."""
        ids = self._require_name(name)
        if reference in ids:
            return reference
        if parse_version_id(reference) is not None:
            raise NotFoundError(f"{name} has no version {reference}")
        sequence = parse_sequence(reference)
        if sequence is not None:
            for version_id in ids:
                if int(version_id[1:].split("-")[0]) == sequence:
                    return version_id
            raise NotFoundError(f"{name} has no version with sequence number {sequence}")
        check_name(reference, what="version or alias")
        state = self.alias(name, reference)
        if state is None:
            raise NotFoundError(f"{name} has no version or alias called {reference!r}")
        return state.version

    def read_version(self, name: str, reference: str) -> StoredVersion:
        """Read a version and verify every file against its checksum; raises :class:`IntegrityError` if any fails."""
        version_id = self.resolve(name, reference)
        base = f"{name}/versions/{version_id}"
        try:
            seal = json.loads(self.storage.read(f"{base}/{SEAL_FILE}"))
            expected: dict[str, dict[str, Any]] = seal["files"]
            derived = set(seal["derived"])
        except (FileNotFoundError, ValueError, KeyError, TypeError) as error:
            raise IntegrityError(f"{name} {version_id}: {SEAL_FILE} is missing or unreadable ({error})") from None
        files: dict[str, bytes] = {}
        for file_name, record in sorted(expected.items()):
            try:
                data = self.storage.read(f"{base}/{file_name}")
            except FileNotFoundError:
                raise IntegrityError(f"{name} {version_id}: {file_name} is missing") from None
            if hashlib.sha256(data).hexdigest() != record.get("sha256"):
                raise IntegrityError(f"{name} {version_id}: {file_name} does not match its sha256 (damaged or changed)")
            files[file_name] = data
        content = {file_name: record for file_name, record in expected.items() if file_name not in derived}
        if not _content_hash(content).startswith(version_id.split("-")[1]):
            raise IntegrityError(f"{name} {version_id}: the checksums do not match the version id")
        card = self._read_card(name, version_id)
        try:
            artifact = decode_artifact(files, source=f"{name} {version_id}")
        except ArtifactFormatError as error:
            raise IntegrityError(str(error)) from None
        return StoredVersion(name=name, id=version_id, files=files, card=card, artifact=artifact)

    def verify(self, name: str | None = None) -> list[VerificationResult]:
        """Verify every visible version of ``name`` (or of every eraser) with its records, each alias and the history.

        Every problem is reported and the check carries on: one damaged file never hides another.
        """
        results = []
        for each in [name] if name is not None else self.names():
            good = set()
            for version_id in self._require_name(each):
                try:
                    self.read_version(each, version_id)
                except IntegrityError as error:
                    results.append(VerificationResult(each, version_id, False, str(error)))
                else:
                    good.add(version_id)
                    results.append(VerificationResult(each, version_id, True))
                    results += self._verify_records(each, version_id)
            for state in self.aliases(each).values():
                if state.version not in good:
                    results.append(
                        VerificationResult(each, state.version, False, f"alias {state.alias!r} names a bad version")
                    )
            results += [
                VerificationResult(each, "-", False, problem) for problem in self.damaged_aliases(each).values()
            ]
            try:
                self.history(each)
            except IntegrityError as error:
                results.append(VerificationResult(each, "-", False, str(error)))
        return results

    def _verify_records(self, name: str, version_id: str) -> list[VerificationResult]:
        failures = []
        for kind in KINDS:
            try:
                read_records(self.storage, name, version_id, kind)
            except IntegrityError as error:
                failures.append(VerificationResult(name, version_id, False, str(error)))
        return failures

    # ----------------------------------------------------------------- records about a version

    def add_record(
        self, name: str, reference: str, kind: str, body: dict[str, Any], *, key: str | None = None
    ) -> Record:
        """Append a record about a version (see :mod:`veil.registry.records`); idempotent on ``key``."""
        return append_record(self.storage, name, self.resolve(name, reference), kind, body, key=key)

    def record(self, name: str, reference: str, kind: str, key: str) -> Record | None:
        """A version's record of ``kind`` with ``key``, verified, or None (no other record is read)."""
        return find_record(self.storage, name, self.resolve(name, reference), kind, key)

    def records(self, name: str, reference: str, kind: str) -> list[Record]:
        """A version's records of ``kind``, oldest first, each verified against its checksum."""
        return read_records(self.storage, name, self.resolve(name, reference), kind)

    # ----------------------------------------------------------------- aliases and history

    def alias(self, name: str, alias: str) -> AliasState | None:
        """Where ``alias`` points (None: never set, or removed); :class:`IntegrityError` if its file is damaged."""
        check_name(alias, what="alias")
        data = self._alias_data(name, alias)
        if data is None or data.get("removed") is True:
            return None
        try:
            return AliasState(alias=alias, version=str(data["version"]), event=int(data["event"]), dim=int(data["dim"]))
        except (ValueError, KeyError, TypeError) as error:
            raise IntegrityError(f"{name}: alias {alias!r} is unreadable ({error})") from None

    def _alias_data(self, name: str, alias: str) -> dict[str, Any] | None:
        try:
            data = json.loads(self.storage.read(f"{name}/aliases/{alias}.json"))
        except FileNotFoundError:
            return None
        except ValueError as error:
            raise IntegrityError(f"{name}: alias {alias!r} is unreadable ({error})") from None
        if not isinstance(data, dict):
            raise IntegrityError(f"{name}: alias {alias!r} is unreadable (not a JSON object)")
        return data

    def _alias_event(self, name: str, alias: str) -> int | None:
        """The history event the alias's file reflects (a removal too); None without a file."""
        data = self._alias_data(name, alias)
        try:
            return None if data is None else int(data["event"])
        except (ValueError, KeyError, TypeError) as error:
            raise IntegrityError(f"{name}: alias {alias!r} is unreadable ({error})") from None

    def _alias_names(self, name: str) -> list[str]:
        entries = self.storage.list(f"{name}/aliases")
        return [
            e.removesuffix(".json") for e in entries if e.endswith(".json") and self._is_name(e.removesuffix(".json"))
        ]

    def aliases(self, name: str) -> dict[str, AliasState]:
        """Every alias that points at a version; a damaged one is left out here (see :meth:`damaged_aliases`)."""
        found = {}
        for alias in self._alias_names(name):
            try:
                state = self.alias(name, alias)
            except IntegrityError:
                continue
            if state is not None:
                found[alias] = state
        return found

    def damaged_aliases(self, name: str) -> dict[str, str]:
        """Each alias whose file cannot be read, with the problem (``veil promote`` or ``remove-alias`` repairs it)."""
        problems = {}
        for alias in self._alias_names(name):
            try:
                self._alias_event(name, alias)
                self.alias(name, alias)
            except IntegrityError as error:
                problems[alias] = str(error)
        return problems

    def history(self, name: str) -> list[HistoryEvent]:
        """Every promote, rollback and alias removal of ``name``, in order.

        Only an alias's latest event can be unfinished (moves hold the lock, and write the event before the
        alias): it is when the alias's file does not reflect it yet.  A damaged alias's events count as applied.
        """
        check_name(name)
        events = sorted((self._read_event(name, entry) for entry in self._event_files(name)), key=lambda e: e.event)
        latest = {event.alias: event.event for event in events}
        damaged = self.damaged_aliases(name)
        reflected = {alias: self._alias_event(name, alias) for alias in latest if alias not in damaged}
        out = []
        for event in events:
            done = reflected.get(event.alias)
            unfinished = event.alias in reflected and event.event == latest[event.alias] and (done or 0) < event.event
            out.append(HistoryEvent(**{**event.to_dict(), "applied": False}) if unfinished else event)
        return out

    def _read_event(self, name: str, entry: str) -> HistoryEvent:
        try:
            data = json.loads(self.storage.read(f"{name}/history/{entry}"))
            return HistoryEvent(
                event=int(data["event"]),
                time=str(data["time"]),
                user=str(data["user"]),
                alias=str(data["alias"]),
                action=str(data["action"]),
                from_version=data["from_version"],
                to_version=data["to_version"],
                reason=str(data["reason"]),
                forced=data.get("forced", False) is True,
            )
        except (ValueError, KeyError, TypeError) as error:
            raise IntegrityError(f"{name}: history event {entry} is unreadable ({error})") from None

    # ----------------------------------------------------------------- writing

    def _locked(self, name: str) -> AbstractContextManager[None]:
        return self.storage.lock(f"{name}/lock", timeout=LOCK_TIMEOUT_SECONDS)

    def add_version(
        self,
        name: str,
        files: Mapping[str, bytes],
        *,
        derived: Callable[[str], Mapping[str, bytes]] | None = None,
    ) -> str:
        """Store a new immutable version of ``name``; returns its id.

        ``files`` must hold a card and an eraser that decodes: a version that
        could not be served is never stored.  ``derived``, given the new id,
        returns further files made from it (a report page that names its
        version); they are checksummed like the rest but are not part of the
        content hash.  The version becomes visible in one step, complete, or
        not at all.
        """
        check_name(name)
        if CARD_FILE not in files:
            raise ValueError(f"a version needs a {CARD_FILE}")
        if SEAL_FILE in files:
            raise ValueError(f"{SEAL_FILE} is written by the registry")
        try:
            decode_artifact(files, source="the new version")
        except ArtifactFormatError as error:
            raise IntegrityError(str(error)) from None
        content_hash = _content_hash(_checksums(files))
        with self._locked(name):
            sequence = 1 + max((int(v[1:].split("-")[0]) for v in self._version_ids(name)), default=0)
            version_id = format_version_id(sequence, content_hash)
            extra = dict(derived(version_id)) if derived is not None else {}
            clash = sorted(set(extra) & {*files, SEAL_FILE})
            if clash:
                raise ValueError(f"a derived file may not replace {clash[0]}")
            seal = {"version": version_id, "files": _checksums({**files, **extra}), "derived": sorted(extra)}
            payload = {**files, **extra, SEAL_FILE: json.dumps(seal, indent=2, sort_keys=True).encode()}
            self.storage.publish(f"{name}/versions/{version_id}", payload, seal=SEAL_FILE)
        return version_id

    def promote(
        self,
        name: str,
        reference: str,
        *,
        alias: str = DEFAULT_ALIAS,
        reason: str = "",
        user: str | None = None,
        allow_dimension_change: bool = False,
        force: bool = False,
    ) -> HistoryEvent:
        """Point ``alias`` at a version (verified first) and record the move.

        A version whose verdict (its card's headline: the threats it claims) is ``alert`` is refused unless
        ``force``, which needs a ``reason``; the event then records that it was forced.

        Raises
        ------
        IntegrityError
            The version fails verification; the alias is left as it was.
        AlertVerdictError
            The version's verdict is alert and ``force`` is False (a :class:`PromotionError`).
        PromotionError
            The alias already points at the version, the version's dimension differs from the alias's current
            one and ``allow_dimension_change`` is False, or ``force`` overrides an alert without a reason.
        """
        check_name(alias, what="alias")
        with self._locked(name):
            self._finish_interrupted_moves(name)
            target = self.read_version(name, reference)
            current, _ = self._current(name, alias)
            if current is not None and current.version == target.id:
                # A move to where the alias already points changes nothing and would record an empty event.
                raise PromotionError(f"alias {alias!r} of {name} already points at {target.id}; nothing to promote")
            forced = self._check_verdict(name, alias, target, force=force, reason=reason)
            return self._move(name, alias, "promote", target, reason, user, allow_dimension_change, forced=forced)

    @staticmethod
    def _check_verdict(name: str, alias: str, target: StoredVersion, *, force: bool, reason: str) -> bool:
        """Refuse a promotion onto a version whose verdict is alert unless forced with a reason; whether forced."""
        verdict = promotion_verdict(target.card)
        if verdict is None or verdict.status != "alert":
            return False
        if not force:
            raise AlertVerdictError(
                f"{name} {target.id} has the verdict {verdict.sentence()}; alias {alias!r} is left as it was "
                "(force it with a reason if this is known and accepted; the history records both)"
            )
        if not reason.strip():
            raise PromotionError(
                f"{name} {target.id}'s verdict is alert: a forced promotion needs a reason, which the history records"
            )
        return True

    def rollback(
        self,
        name: str,
        *,
        alias: str = DEFAULT_ALIAS,
        reason: str = "",
        user: str | None = None,
        allow_dimension_change: bool = False,
    ) -> HistoryEvent:
        """Move ``alias`` back to the target it had before its latest promote that is not yet rolled back."""
        check_name(alias, what="alias")
        with self._locked(name):
            # A damaged alias rolls back by its history all the same (the move rewrites its file, and says so).
            self._existing(name, alias, "roll back")
            undo_stack: list[str | None] = []
            for event in self.history(name):
                # A promote that rewrote a damaged alias onto the version it held moved nothing: nothing to undo.
                if event.alias == alias and event.action == "promote" and event.from_version != event.to_version:
                    undo_stack.append(event.from_version)
                elif event.alias == alias and event.action == "rollback" and undo_stack:
                    undo_stack.pop()
            if not undo_stack or undo_stack[-1] is None:
                raise PromotionError(f"{name}: alias {alias!r} has no earlier version to roll back to")
            target = self.read_version(name, undo_stack[-1])
            # Rolling back is the emergency path, never refused for a verdict; the history says what it went to.
            verdict = promotion_verdict(target.card)
            if verdict is not None and verdict.status == "alert":
                reason = f"{reason} (onto a version whose verdict is alert)".lstrip()
            return self._move(name, alias, "rollback", target, reason, user, allow_dimension_change)

    def _move(
        self,
        name: str,
        alias: str,
        action: str,
        target: StoredVersion,
        reason: str,
        user: str | None,
        allow_dimension_change: bool,
        *,
        forced: bool = False,
    ) -> HistoryEvent:
        current, problem = self._current(name, alias)
        from_version = None if current is None else current.version
        served = None if current is None else current.dim
        if problem is not None:
            # What the damaged file last held is the target of the alias's latest event in the history.
            from_version = self._last_target(name, alias)
            served = None if from_version is None else int(self._read_card(name, from_version).get("dim", 0))
            reason = f"{reason} (the alias's file was damaged and is rewritten: {problem})".lstrip()
        dim = target.artifact.map.dim
        if served is not None and served != dim and not allow_dimension_change:
            raise PromotionError(
                f"{name} {target.id} has dimension {dim} but alias {alias!r} serves dimension {served}; "
                "pass the dimension-change flag if every caller is ready for it"
            )
        event = HistoryEvent(
            event=self._next_event(name),
            time=_now(),
            user=user or current_user(),
            alias=alias,
            action=action,
            from_version=from_version,
            to_version=target.id,
            reason=reason,
            forced=forced,
        )
        self._record(name, event)
        self._write_alias(name, AliasState(alias=alias, version=target.id, event=event.event, dim=dim))
        return event

    def remove_alias(self, name: str, alias: str, *, reason: str = "", user: str | None = None) -> HistoryEvent:
        """Remove ``alias`` (a damaged one too) and record the removal; the versions stay as they are.

        Raises
        ------
        PromotionError
            ``name`` has no such alias.
        """
        check_name(alias, what="alias")
        with self._locked(name):
            current, problem = self._existing(name, alias, "remove")
            if problem is not None:
                reason = f"{reason} (the alias's file was damaged: {problem})".lstrip()
            event = HistoryEvent(
                event=self._next_event(name),
                time=_now(),
                user=user or current_user(),
                alias=alias,
                action="remove",
                from_version=self._last_target(name, alias) if current is None else current.version,
                to_version=None,
                reason=reason,
            )
            self._record(name, event)
            self._write_removal(name, alias, event.event)
            return event

    def _existing(self, name: str, alias: str, action: str) -> tuple[AliasState | None, str | None]:
        """:meth:`_current` of an alias a rollback or removal needs (a damaged one too), after finishing moves."""
        self._finish_interrupted_moves(name)
        self._require_name(name)
        current, problem = self._current(name, alias)
        if current is None and problem is None:
            raise PromotionError(f"{name} has no alias {alias!r} to {action}")
        return current, problem

    def _current(self, name: str, alias: str) -> tuple[AliasState | None, str | None]:
        """Where ``alias`` points, or why its file cannot be read."""
        try:
            return self.alias(name, alias), None
        except IntegrityError as error:
            return None, str(error)

    def _last_target(self, name: str, alias: str) -> str | None:
        moves = [event for event in self.history(name) if event.alias == alias]
        return moves[-1].to_version if moves else None

    def _record(self, name: str, event: HistoryEvent) -> None:
        # The event first, then the alias: a crash in between leaves the alias on its old, complete target.
        if not self.storage.create_once(self._event_path(name, event.event), json.dumps(event.to_dict()).encode()):
            raise PromotionError(f"{name}: history event {event.event} appeared while the lock was held")

    def _write_removal(self, name: str, alias: str, event: int) -> None:
        # A tombstone, written atomically like any alias: the storage backends replace files but delete none.
        self.storage.replace(f"{name}/aliases/{alias}.json", json.dumps({"removed": True, "event": event}).encode())

    def _next_event(self, name: str) -> int:
        return 1 + max((int(e[:-5]) for e in self._event_files(name)), default=0)

    def _event_files(self, name: str) -> Iterator[str]:
        return (e for e in self.storage.list(f"{name}/history") if e.endswith(".json") and e[:-5].isdigit())

    @staticmethod
    def _event_path(name: str, number: int) -> str:
        return f"{name}/history/{number:0{_EVENT_DIGITS}d}.json"

    def _write_alias(self, name: str, state: AliasState) -> None:
        self.storage.replace(f"{name}/aliases/{state.alias}.json", json.dumps(asdict(state)).encode())

    def _finish_interrupted_moves(self, name: str) -> None:
        """Complete a move whose writer died after recording it and before moving the alias."""
        for event in self.history(name):
            if not event.applied and event.to_version is None:
                self._write_removal(name, event.alias, event.event)
            elif not event.applied and event.to_version is not None:
                dim = int(self._read_card(name, event.to_version).get("dim", 0))
                state = AliasState(alias=event.alias, version=event.to_version, event=event.event, dim=dim)
                self._write_alias(name, state)
