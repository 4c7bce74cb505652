"""``veil patrol``: rounds against a running service, once or at the start of every slot, each recorded."""

from __future__ import annotations

import contextlib
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import httpx
import numpy as np
from numpy.typing import NDArray

from veil.checks.verdict import LEVELS
from veil.errors import DataError
from veil.patrol.replicas import ReplicaSet
from veil.patrol.rounds import PostedSample, RecordedRound, patrol_round, replicas_round, slot_start
from veil.registry import Registry
from veil_client import RecentTraffic, VeilClient, VeilClientError, VeilServerError, VeilTransportError

#: Answers of the service that leave a round with nothing to record, rather than failing the patrol.
_NOTHING_TO_CHECK = {"no_traffic"}
#: A replica that does not answer is given up on quickly (one retry), and named in the record.
_FETCH_RETRIES = 1
#: A merged sample holds several replicas' rows: its check may take longer than one replica's.
_MERGED_CHECK_TIMEOUT = httpx.Timeout(120.0, connect=5.0)


@dataclass(frozen=True)
class PatrolSummary:
    """What a run of rounds recorded: how many checks, and the worst status among them (``ok`` for none)."""

    recorded: int
    worst: str


def run_patrol(
    registry: Registry,
    name: str,
    *,
    service: str,
    token: str | None,
    admin_token: str | None = None,
    replicas: ReplicaSet | None = None,
    sample: PostedSample | None,
    every: float,
    rounds: int | None,
    say: Callable[[str], None],
    clock: Callable[[], float] = time.time,
    sleep: Callable[[float], None] = time.sleep,
) -> PatrolSummary:
    """Run ``rounds`` rounds (None: until stopped), the first at once and each later one at a slot's start.

    Returns how many checks the rounds recorded (new or found stored) and the worst status they recorded.  A
    service that cannot be reached, or answers 5xx, skips the round when
    more rounds follow and raises when it is the last; a 4xx other than "no
    traffic yet" (an unknown eraser, a refused token) raises at once.

    With ``replicas``, each round fetches every replica's recent traffic and
    records one check of it merged per version served
    (:func:`veil.patrol.rounds.replicas_round`), naming every replica that did
    not answer; ``service`` is then unused.  The round fails as above only
    when no replica answers.
    """
    if every <= 0:
        raise DataError(f"--every must be a positive number of seconds, got {every}")
    if rounds is not None and rounds < 1:
        raise DataError(f"--rounds must be at least 1, got {rounds}")
    if replicas is not None and sample is not None:
        raise DataError("a posted --sample is checked by one service: give one --service, no --replicas-of")
    recorded, worst = 0, LEVELS[0]
    with contextlib.ExitStack() as stack:
        if replicas is None:
            client = stack.enter_context(VeilClient(service, token=token))
            one_round = _single_round(registry, name, client, service, sample, every)
        else:
            one_round = _merged_round(registry, name, replicas, token, admin_token, every)
        done = 0
        while True:
            now = clock()
            last = rounds is not None and done + 1 >= rounds
            try:
                recorded_rounds = one_round(now)
            except VeilClientError as error:
                if error.code not in _NOTHING_TO_CHECK:
                    raise DataError(f"the service refused the check: {error}") from None
                say(f"{name}: nothing to check yet ({error.message}); nothing recorded")
            except (VeilTransportError, VeilServerError) as error:
                if last:
                    raise
                say(f"{name}: round skipped, the service did not answer ({error})")
            else:
                for recorded_round in recorded_rounds:
                    recorded += 1
                    worst = max(worst, str(recorded_round.outcome.record.body["status"]), key=LEVELS.index)
                    say(recorded_round.describe(name))
            done += 1
            if last:
                return PatrolSummary(recorded, worst)
            sleep(max(0.0, slot_start(now, every) + every - clock()))
    raise AssertionError("unreachable: the loop returns")


#: A round: the checks it recorded (or found recorded) for the slot of the time given.
RoundCall = Callable[[float], list[RecordedRound]]


def _single_round(
    registry: Registry, name: str, client: VeilClient, service: str, sample: PostedSample | None, every: float
) -> RoundCall:
    """A round against one service: its check of its recent traffic, or of the posted sample."""

    def check(eraser: str, posted: PostedSample | None) -> dict[str, Any]:
        if posted is None:
            return client.drift(eraser)
        return client.drift(eraser, posted.vectors, posted.labels, context=posted.context)

    def one_round(now: float) -> list[RecordedRound]:
        outcome = patrol_round(registry, name, check, service=service, sample=sample, every=every, now=now)
        return [RecordedRound(outcome)]

    return one_round


def _merged_round(
    registry: Registry, name: str, replicas: ReplicaSet, token: str | None, admin_token: str | None, every: float
) -> RoundCall:
    """A round over replicas: their recent traffic merged, one check per version served."""

    def one_round(now: float) -> list[RecordedRound]:
        merged = replicas_round(
            registry, name, replicas, _fetch(name, admin_token), _post(name, token), every=every, now=now
        )
        return [RecordedRound(outcome, merged) for outcome in merged.outcomes]

    return one_round


def _fetch(name: str, token: str | None) -> Callable[[str], RecentTraffic]:
    """How a round asks one replica for its recent traffic (a new connection each time: replicas come and go)."""

    def fetch(address: str) -> RecentTraffic:
        with VeilClient(address, token=token, retries=_FETCH_RETRIES) as replica:
            return replica.recent(name)

    return fetch


def _post(name: str, token: str | None) -> Callable[[str, NDArray[np.float32], str], dict[str, Any]]:
    """How a round has one replica check a merged sample, pinned to the version its replicas serve."""

    def post(address: str, vectors: NDArray[np.float32], version: str) -> dict[str, Any]:
        with VeilClient(address, token=token, retries=_FETCH_RETRIES, timeout=_MERGED_CHECK_TIMEOUT) as replica:
            return replica.drift(name, vectors, version=version)

    return post
