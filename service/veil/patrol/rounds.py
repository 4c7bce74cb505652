"""One patrol round: ask the service for a check, append the answer to the registry, once per time slot.

Time is cut into slots of ``every`` seconds.  A round's record key is
derived from the eraser, what is checked and the slot, so a round that is
retried (a scheduler re-running a failed job, a patrol killed mid-append and
started again) completes the slot's record if it is missing and otherwise
finds it there: one record per slot, never two, never a partial one.
"""

from __future__ import annotations

import hashlib
import json
import math
from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil.registry import Registry
from veil.registry.records import Record

CHECKS = "checks"


@dataclass(frozen=True)
class PostedSample:
    """A sample of raw live vectors the patrol posts each round, and where it came from.

    ``labels``: none (the service predicts pseudo-labels), one categorical
    attribute's class names (the version's first attribute), or attributes'
    labels by name (numbers for a continuous one).  ``context``: each row's
    value of a context column, for leakage within each value (None: the
    population only).
    """

    vectors: NDArray[np.floating]
    labels: list[str] | dict[str, list[str] | list[float]] | None
    file: str
    sha256: str
    context: list[str] | None = None

    def describe(self) -> dict[str, Any]:
        return {"kind": "posted sample", "file": self.file, "sha256": self.sha256, "rows": int(self.vectors.shape[0])}


#: ``check(name, sample)``: the service's drift report for ``name``, on ``sample`` or on its recent traffic.
CheckCall = Callable[[str, PostedSample | None], dict[str, Any]]


def _iso(seconds: float) -> str:
    return datetime.fromtimestamp(seconds, UTC).isoformat(timespec="seconds")


def slot_start(now: float, every: float) -> float:
    """The start of the slot of ``every`` seconds that holds ``now`` (seconds since the epoch)."""
    return math.floor(now / every) * every


def round_key(name: str, service: str, sample: PostedSample | None, slot: float, every: float) -> str:
    """The record key of a round: the eraser, the service, what is checked and the slot (its start and length)."""
    # A posted sample is its file and the labels it posts (another attribute of the same file is another check).
    what = "recent traffic" if sample is None else f"{sample.sha256}\n{json.dumps(sample.labels, sort_keys=True)}"
    if sample is not None and sample.context is not None:
        # Only then: the keys of rounds without a context stay what they were.
        what += "\n" + json.dumps(sample.context)
    return hashlib.sha256(f"{name}\n{service}\n{what}\n{slot!r}\n{every!r}".encode()).hexdigest()[:16]


def find_check(registry: Registry, name: str, key: str) -> Record | None:
    """The check record with ``key`` under any version of ``name`` (None if there is none)."""
    for summary in registry.versions(name):
        found = registry.record(name, summary.id, CHECKS, key)
        if found is not None:
            return found
    return None


@dataclass(frozen=True)
class RoundOutcome:
    """What a round did: the record of its slot, and whether an earlier run had stored it."""

    record: Record
    already_stored: bool


def patrol_round(
    registry: Registry,
    name: str,
    check: CheckCall,
    *,
    service: str,
    sample: PostedSample | None,
    every: float,
    now: float,
) -> RoundOutcome:
    """Record the check of the slot holding ``now``, asking the service only if the slot has no record yet.

    Raises whatever ``check`` raises (the service unreachable, no traffic yet): nothing is recorded then.
    """
    slot = slot_start(now, every)
    key = round_key(name, service, sample, slot, every)
    stored = find_check(registry, name, key)
    if stored is not None:
        return RoundOutcome(stored, already_stored=True)
    report = check(name, sample)
    body = {
        "checked_at": _iso(now),
        "slot": _iso(slot),
        "every_seconds": every,
        "service": service,
        "checked": {"kind": "recent traffic"} if sample is None else sample.describe(),
        "version": report["version"],
        "status": report["status"],
        "reasons": list(report.get("reasons", [])),
        "report": report,
    }
    return RoundOutcome(registry.add_record(name, str(report["version"]), CHECKS, body, key=key), already_stored=False)


def check_history(registry: Registry, name: str, *, since: datetime | None = None) -> list[Record]:
    """Every check record of ``name`` (each verified), in the order they were checked, from ``since`` on."""
    records = [record for summary in registry.versions(name) for record in registry.records(name, summary.id, CHECKS)]
    if since is not None:
        records = [record for record in records if datetime.fromisoformat(record.body["checked_at"]) >= since]
    return sorted(records, key=lambda record: (record.body["checked_at"], record.version, record.number))
