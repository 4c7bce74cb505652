"""``veil patrol``: rounds against a running service, once or at the start of every slot, each recorded."""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from veil.checks.verdict import LEVELS
from veil.errors import DataError
from veil.patrol.rounds import PostedSample, patrol_round, slot_start
from veil.registry import Registry
from veil_client import VeilClient, VeilClientError, VeilServerError, VeilTransportError

#: Answers of the service that leave a round with nothing to record, rather than failing the patrol.
_NOTHING_TO_CHECK = {"no_traffic"}


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
    sample: PostedSample | None,
    every: float,
    rounds: int | None,
    say: Callable[[str], None],
    clock: Callable[[], float] = time.time,
    sleep: Callable[[float], None] = time.sleep,
) -> PatrolSummary:
    """Run ``rounds`` rounds (None: until stopped), the first at once and each later one at a slot's start.

    Returns how many rounds recorded a check (new or found stored) and the worst status they recorded.  A
    service that cannot be reached, or answers 5xx, skips the round when
    more rounds follow and raises when it is the last; a 4xx other than "no
    traffic yet" (an unknown eraser, a refused token) raises at once.
    """
    if every <= 0:
        raise DataError(f"--every must be a positive number of seconds, got {every}")
    if rounds is not None and rounds < 1:
        raise DataError(f"--rounds must be at least 1, got {rounds}")
    recorded, worst = 0, LEVELS[0]
    with VeilClient(service, token=token) as client:

        def check(eraser: str, posted: PostedSample | None) -> dict[str, Any]:
            if posted is None:
                return client.drift(eraser)
            return client.drift(eraser, posted.vectors, posted.labels, context=posted.context)

        done = 0
        while True:
            now = clock()
            last = rounds is not None and done + 1 >= rounds
            try:
                outcome = patrol_round(registry, name, check, service=service, sample=sample, every=every, now=now)
            except VeilClientError as error:
                if error.code not in _NOTHING_TO_CHECK:
                    raise DataError(f"the service refused the check: {error}") from None
                say(f"{name}: nothing to check yet ({error.message}); nothing recorded")
            except (VeilTransportError, VeilServerError) as error:
                if last:
                    raise
                say(f"{name}: round skipped, the service did not answer ({error})")
            else:
                recorded += 1
                body = outcome.record.body
                worst = max(worst, str(body["status"]), key=LEVELS.index)
                state = "already recorded" if outcome.already_stored else "recorded"
                say(
                    f"{body['checked_at']} {name} {body['version']}: {body['status']}"
                    f"{' (' + '; '.join(body['reasons']) + ')' if body['reasons'] else ''}, {state} as check "
                    f"{outcome.record.number}"
                )
            done += 1
            if last:
                return PatrolSummary(recorded, worst)
            sleep(max(0.0, slot_start(now, every) + every - clock()))
