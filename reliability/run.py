"""``make reliability``: every reliability and security check at full size, one table, figures as JSON.

    python -m reliability.run            # full size (several minutes)
    python -m reliability.run --quick    # the sizes make test uses
    python -m reliability.run --only load,faults --json out.json

Servers are real ``veil serve`` processes on loopback ports; everything is
written under a temporary directory removed at the end.
"""

from __future__ import annotations

import argparse
import json
import platform
import sys
import tempfile
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass
from datetime import UTC, datetime
from pathlib import Path

from reliability.badinput import BODY_LIMIT, bad_input_against
from reliability.crashloop import crash_loop
from reliability.faults import faults_while_serving
from reliability.fuzz import fuzz_against
from reliability.livechecks import live_checks
from reliability.load import LoadCell, measure_load, rollback_under_load
from reliability.outcome import Outcome, format_table
from reliability.security import code_and_cors_outcome, logs_outcome
from reliability.server import live_server
from reliability.workbench import ADMIN_TOKEN, PLANTED, PROFILES, build_registry


@dataclass(frozen=True)
class Size:
    clients: int
    cells: tuple[LoadCell, ...]
    rollback_cycles: int
    crash_trials: int
    fuzz_examples: int
    #: Live checks: rows the version is fitted on, undrifted checks per labels mode (over 100, 300 and 1,000
    #: rows), checks per planted change and labels mode, rounds of the merged check over three replicas.
    live_fit_rows: int
    alarm_checks: int
    detection_checks: int
    replica_rounds: int


FULL = Size(
    clients=32,
    cells=(LoadCell(1, "npy", 5000), LoadCell(1, "json", 5000), LoadCell(256, "npy", 2000), LoadCell(256, "json", 400)),
    rollback_cycles=25,
    crash_trials=60,
    fuzz_examples=200,
    live_fit_rows=16000,
    alarm_checks=255,
    detection_checks=100,
    replica_rounds=3,
)
QUICK = Size(
    clients=8,
    cells=(LoadCell(1, "npy", 200), LoadCell(1, "json", 200), LoadCell(256, "npy", 40), LoadCell(256, "json", 16)),
    rollback_cycles=3,
    crash_trials=8,
    fuzz_examples=10,
    live_fit_rows=3000,
    alarm_checks=3,
    detection_checks=1,
    replica_rounds=1,
)
SERVED = [PROFILES, PLANTED]
ADMIN = {"VEIL_ADMIN_TOKEN": ADMIN_TOKEN, "VEIL_MAX_BODY_BYTES": str(BODY_LIMIT)}


def serving_checks(workdir: Path, size: Size) -> list[Outcome]:
    """Bad input, load and fuzzing share one server (in that order: the table expects an unused planted eraser)."""
    registry = build_registry(workdir / "serving")
    with live_server(registry.path, names=SERVED, log=workdir / "serving.log", environment=ADMIN) as server:
        outcomes = [bad_input_against(server.base_url)]
        outcomes += measure_load(server.base_url, registry, size.cells, clients=size.clients)
        outcomes.append(
            fuzz_against(server.base_url, max_examples=size.fuzz_examples, admin_token=ADMIN_TOKEN, names=SERVED)
        )
        outcomes.append(code_and_cors_outcome(server.base_url))
        if not server.alive():
            outcomes.append(
                Outcome("serving: process alive", False, "the server died", [server.log.read_text()[-500:]])
            )
    return outcomes


def rollback_checks(workdir: Path, size: Size) -> list[Outcome]:
    """Two workers polling the alias every 0.1 s, so each move reaches both within the cycle."""
    registry = build_registry(workdir / "rollback")
    environment = {**ADMIN, "VEIL_POLL_SECONDS": "0.1"}
    with live_server(
        registry.path, names=SERVED, log=workdir / "rollback.log", workers=2, environment=environment
    ) as server:
        return [rollback_under_load(server.base_url, registry, cycles=size.rollback_cycles, clients=size.clients)]


def fault_checks(workdir: Path, size: Size) -> list[Outcome]:
    """No polling: each reload is asked for, so each fault is seen by exactly the reload that checks it."""
    registry = build_registry(workdir / "faults")
    environment = {**ADMIN, "VEIL_POLL_SECONDS": "0"}
    with live_server(registry.path, names=SERVED, log=workdir / "faults.log", environment=environment) as server:
        outcomes = faults_while_serving(server.base_url, registry, admin_token=ADMIN_TOKEN, alive=server.alive)
    return outcomes


def crash_checks(workdir: Path, size: Size) -> list[Outcome]:
    (workdir / "crash").mkdir()
    return [crash_loop(workdir / "crash", trials=size.crash_trials)]


def live_check_measures(workdir: Path, size: Size) -> list[Outcome]:
    """False alarms, detection and the merged check, against three replicas of one version (reliability.livechecks)."""
    return live_checks(
        workdir, fit_rows=size.live_fit_rows, alarm_checks=size.alarm_checks,
        detection_checks=size.detection_checks, replica_rounds=size.replica_rounds,
    )  # fmt: skip


GROUPS: dict[str, Callable[[Path, Size], list[Outcome]]] = {
    "serving": serving_checks,
    "rollback": rollback_checks,
    "faults": fault_checks,
    "crash": crash_checks,
    "live": live_check_measures,
}


def run(groups: list[str], size: Size) -> tuple[list[Outcome], float]:
    started = time.monotonic()
    outcomes: list[Outcome] = []
    with tempfile.TemporaryDirectory(prefix="veil-reliability-") as scratch:
        for group in groups:
            outcomes += GROUPS[group](Path(scratch), size)
        logs = sorted(Path(scratch).glob("*.log"))
        if logs:
            outcomes.append(logs_outcome(logs, [ADMIN_TOKEN]))
    return outcomes, time.monotonic() - started


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m reliability.run", description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="the small sizes make test uses")
    parser.add_argument("--only", default=",".join(GROUPS), help=f"comma-separated groups of {sorted(GROUPS)}")
    parser.add_argument("--json", type=Path, help="also write the outcomes to this file")
    args = parser.parse_args(argv)
    groups = [g.strip() for g in args.only.split(",") if g.strip()]
    unknown = sorted(set(groups) - set(GROUPS))
    if unknown:
        parser.error(f"unknown groups {unknown}; choose from {sorted(GROUPS)}")
    size = QUICK if args.quick else FULL
    outcomes, seconds = run(groups, size)
    print(format_table(outcomes))
    failed = [o.check for o in outcomes if not o.passed]
    print(f"\n{len(outcomes) - len(failed)} of {len(outcomes)} checks passed in {seconds:.0f} s")
    if args.json is not None:
        record = {
            "when": datetime.now(UTC).isoformat(timespec="seconds"),
            "machine": {"python": platform.python_version(), "platform": platform.platform()},
            "size": asdict(size),
            "seconds": round(seconds, 1),
            "outcomes": [asdict(o) for o in outcomes],
        }
        args.json.parent.mkdir(parents=True, exist_ok=True)
        args.json.write_text(json.dumps(record, indent=2) + "\n")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
