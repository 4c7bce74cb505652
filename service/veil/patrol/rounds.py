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

from veil.checks.calibration import CALIBRATED, FIXED
from veil.patrol.replicas import ReplicaSample, ReplicaSet, Resolver, Unanswered, merge_samples
from veil.registry import Registry
from veil.registry.records import Record
from veil_client import RecentTraffic, VeilClientError, VeilHTTPError, VeilServerError, VeilTransportError

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
    checked = {"kind": "recent traffic"} if sample is None else sample.describe()
    body = _body(report, service=service, checked=checked, every=every, now=now)
    return RoundOutcome(registry.add_record(name, str(report["version"]), CHECKS, body, key=key), already_stored=False)


def _body(report: dict[str, Any], *, service: str, checked: dict[str, Any], every: float, now: float) -> dict[str, Any]:
    """A check record's body: when, which slot, what was asked and checked, and the service's report."""
    return {
        "checked_at": _iso(now),
        "slot": _iso(slot_start(now, every)),
        "every_seconds": every,
        "service": service,
        "checked": checked,
        "version": report["version"],
        "status": report["status"],
        # A service from before calibrated levels answers without a rule: its checks were all by fixed levels.
        "rule": report.get("rule", FIXED),
        "reasons": list(report.get("reasons", [])),
        "report": report,
    }


def check_history(registry: Registry, name: str, *, since: datetime | None = None) -> list[Record]:
    """Every check record of ``name`` (each verified), in the order they were checked, from ``since`` on."""
    records = [record for summary in registry.versions(name) for record in registry.records(name, summary.id, CHECKS)]
    if since is not None:
        records = [record for record in records if datetime.fromisoformat(record.body["checked_at"]) >= since]
    return sorted(records, key=lambda record: (record.body["checked_at"], record.version, record.number))


#: ``fetch(address)``: a replica's recent traffic.
FetchCall = Callable[[str], RecentTraffic]
#: ``post(address, vectors, version)``: the drift report of that replica, pinned to ``version``, on ``vectors``.
PostCall = Callable[[str, NDArray[np.float32], str], dict[str, Any]]


@dataclass(frozen=True)
class ReplicasOutcome:
    """What a round over replicas did: one outcome per version served, and who answered."""

    outcomes: list[RoundOutcome]
    reached: list[ReplicaSample]
    unanswered: list[Unanswered]


@dataclass(frozen=True)
class RecordedRound:
    """One check a round recorded (or found), and the round over replicas it came from, if any."""

    outcome: RoundOutcome
    replicas: ReplicasOutcome | None = None

    def describe(self, name: str) -> str:
        """One line for the patrol's output: when, which version, the status and why, which record."""
        body = self.outcome.record.body
        reasons = f" ({'; '.join(body['reasons'])})" if body["reasons"] else ""
        state = "already recorded" if self.outcome.already_stored else "recorded"
        rule = _RULE_WORDS.get(body.get("rule", FIXED), body.get("rule", FIXED))
        line = f"{body['checked_at']} {name} {body['version']}: {body['status']} by {rule}{reasons}, {state} as check "
        line += str(self.outcome.record.number)
        if "replicas" in body:
            line += "; " + replicas_summary(body["replicas"], body["checked"])
        return line


#: How a check line names the rule that judged it.
_RULE_WORDS = {CALIBRATED: "calibrated levels", FIXED: "fixed levels"}


def replicas_summary(replicas: dict[str, Any], checked: dict[str, Any]) -> str:
    """The replicas of a merged check in words: how many merged, how many rows, and who did not answer."""
    merged = [entry for entry in replicas["reached"] if entry["merged_rows"] > 0]
    text = f"{checked['rows']} rows merged from {len(merged)} of {len(replicas['reached'])} replicas reached"
    if replicas["other_versions"]:
        text += f" (others serve {', '.join(replicas['other_versions'])})"
    if replicas["unanswered"]:
        text += "; no answer from " + ", ".join(entry["address"] for entry in replicas["unanswered"])
    return text


def merged_key(name: str, service: str, version: str, slot: float, every: float) -> str:
    """The record key of a merged round: the eraser, the replicas asked, the version checked and the slot."""
    text = f"{name}\n{service}\nmerged recent traffic\n{version}\n{slot!r}\n{every!r}"
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def replicas_round(
    registry: Registry,
    name: str,
    replicas: ReplicaSet,
    fetch: FetchCall,
    post: PostCall,
    *,
    every: float,
    now: float,
    resolve: Resolver | None = None,
) -> ReplicasOutcome:
    """Record one check of every replica's recent traffic merged, per version served, for the slot of ``now``.

    Raises
    ------
    VeilClientError
        Every replica refused (a wrong token, an unknown eraser), or none has seen traffic (``no_traffic``).
    VeilTransportError
        No replica answered: nothing is recorded.
    """
    addresses, unanswered = replicas.addresses(resolve)
    reached, refusals = [], []
    for address in addresses:
        try:
            reached.append(ReplicaSample(address, fetch(address)))
        except (VeilHTTPError, VeilTransportError) as error:
            unanswered.append(Unanswered(address, str(error)))
            if isinstance(error, VeilClientError):
                refusals.append(error)
    if not reached:
        if refusals and len(refusals) == len(unanswered):
            raise refusals[0]
        raise VeilTransportError("no replica answered: " + "; ".join(f"{u.address}: {u.error}" for u in unanswered))
    versions = list(dict.fromkeys(sample.version for sample in reached if sample.traffic.vectors.shape[0] > 0))
    if not versions:
        raise VeilClientError(409, "no_traffic", f"none of the {len(reached)} replicas reached has seen traffic yet")
    outcomes = [
        _version_round(registry, name, replicas.describe(), version, reached, unanswered, post, every, now)
        for version in versions
    ]
    return ReplicasOutcome(outcomes, reached, unanswered)


def _version_round(
    registry: Registry,
    name: str,
    service: str,
    version: str,
    reached: list[ReplicaSample],
    unanswered: list[Unanswered],
    post: PostCall,
    every: float,
    now: float,
) -> RoundOutcome:
    """The check of the merged sample of the replicas serving ``version``, recorded unless the slot has it."""
    key = merged_key(name, service, version, slot_start(now, every), every)
    stored = find_check(registry, name, key)
    if stored is not None:
        return RoundOutcome(stored, already_stored=True)
    mine = [sample for sample in reached if sample.version == version]
    merged = merge_samples(mine, seed=int(key, 16) % 2**32)
    missed: list[Unanswered] = []
    report, checked_by = _check_on_one(post, [sample.address for sample in mine], merged.vectors, version, missed)
    checked = {
        "kind": "recent traffic",
        "rows": int(merged.vectors.shape[0]),
        "sha256": merged.sha256,
        "traffic_seen": sum(sample.traffic.traffic_seen for sample in mine),
    }
    body = _body(report, service=service, checked=checked, every=every, now=now)
    body["replicas"] = {
        "reached": [
            {
                "address": sample.address,
                "version": sample.version,
                "traffic_seen": sample.traffic.traffic_seen,
                "held": int(sample.traffic.vectors.shape[0]),
                "merged_rows": merged.taken.get(sample.address, 0),
            }
            for sample in reached
        ],
        "unanswered": [entry.to_dict() for entry in [*unanswered, *missed]],
        "checked_by": checked_by,
        # A rollout under way: those replicas' traffic is another version's, checked in its own record.
        "other_versions": sorted({sample.version for sample in reached} - {version}),
    }
    return RoundOutcome(registry.add_record(name, version, CHECKS, body, key=key), already_stored=False)


def _check_on_one(
    post: PostCall, addresses: list[str], vectors: NDArray[np.float32], version: str, missed: list[Unanswered]
) -> tuple[dict[str, Any], str]:
    """The report of the first of ``addresses`` that checks ``vectors``; each that could not goes to ``missed``."""
    for address in addresses:
        try:
            return post(address, vectors, version), address
        except (VeilTransportError, VeilServerError) as error:
            missed.append(Unanswered(address, f"did not check the merged sample: {error}"))
    raise VeilTransportError("no replica of " + version + " checked the merged sample: " + "; ".join(
        f"{entry.address}: {entry.error}" for entry in missed
    ))  # fmt: skip
