"""Live checks measured against three real replicas: false alarms, detection of planted changes, the merged check.

One version guarding the pronoun and the age bracket is fitted here on the
committed large sample's fitting rows (:mod:`reliability.planted`) and served
by three ``veil serve`` processes.  Traffic is uneven: each check goes to a
replica drawn with shares 60/30/10, and the traffic the merged check reads is
sent in those shares.

- **False alarms.** Undrifted samples drawn without replacement from the
  held-out rows, in equal numbers at 100, 300 and 1,000 rows, posted to
  ``POST /v1/erasers/{name}/drift``: one series with both attributes' labels,
  one without (the service's pseudo-labels).  Target: at most 1% alerts and
  at most 5% checks at warn or alert, in each series.
- **Detection.** At 300 rows, each planted change of
  :mod:`reliability.planted`, with labels and with pseudo-labels.  Target:
  alerted in at least 95% of the checks.  The sub-population carrying the
  pronoun along a hidden direction is planted at the strength the data sets
  (half the raw class-mean distance of the held-out rows), and also, reported
  but not judged, at :data:`WEAK_CARRYING_SD` standard deviations of the
  held-out rows along the direction, to show where detection stops.
- **Replicas.** Traffic sent to the three replicas, every replica's sample
  fetched and merged by :func:`veil.patrol.rounds.replicas_round` (what
  ``veil patrol`` with three ``--service`` runs), and the vectors it merged
  posted to another replica alone: every figure of the two answers must agree.

A check's status is the service's answer (``status``); the rule that judged
it (``rule``) is printed when the answer names one.  The targets are judged
only from :data:`JUDGED_ALARM_CHECKS` undrifted checks (both series together)
and :data:`JUDGED_DETECTION_CHECKS` checks per change on (the issue's counts):
a quick run measures and shows the figures but judges only that every check
was answered.
"""

from __future__ import annotations

import asyncio
import re
import time
from collections import Counter
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import ThreadPoolExecutor
from contextlib import ExitStack
from dataclasses import dataclass, field
from functools import partial
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy.stats import binomtest

from reliability.outcome import Outcome
from reliability.planted import (
    Population,
    carry_along_hidden_direction,
    carrying_distance,
    hidden_direction,
    prior_shifted_rows,
    shift_along_leading_axis,
    split_population,
    spread_along,
)
from reliability.server import LiveServer, live_server
from reliability.workbench import ADMIN_TOKEN, ALIAS
from veil.checks.reference import REFERENCE_FILE, ReferenceStatistics
from veil.fitting.job import fit_version
from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, StoreSpec
from veil.maps.artifact import MapArtifact
from veil.patrol.replicas import ReplicaSet
from veil.patrol.rounds import replicas_round
from veil.registry import Registry
from veil.samples.attributes import attribute_table
from veil.samples.sources import LabelledSample
from veil_client import AsyncVeilClient, RecentTraffic, VeilClient, VeilError

LIVE = "profiles-live"
SIZES = (100, 300, 1000)
DETECTION_SIZE = 300
#: Each replica's share of the traffic.
TRAFFIC_SHARES = (0.6, 0.3, 0.1)
#: Checks in flight at once: the machine has two cores, shared with the replicas.
CONCURRENCY = 2
#: Each replica's reservoir: smaller than its share of a round's traffic, so the merge draws from the samples.
RESERVOIR_ROWS = 500
#: Raw vectors sent through ``apply`` per round of the merged check.
TRAFFIC_ROWS = 3000
#: The fit's audit reads this many held-out rows (linear probes): the version's figures are not what is measured.
AUDIT_ROWS = 1000
#: The issue's counts: below them a rate says too little to judge a target by.
JUDGED_ALARM_CHECKS = 500
JUDGED_DETECTION_CHECKS = 100
#: Targets, as whole percentages (compared in integers: round-off never decides a target).
ALERT_PERCENT = 1
WARN_PERCENT = 5
DETECTED_PERCENT = 95
#: The sub-population carrying the attribute: its share of the rows.  How far each class is moved is set by the
#: data (:func:`reliability.planted.carrying_distance`); the weaker line reported beside it moves each class this
#: many held-out standard deviations along the hidden direction instead (not judged).
CARRYING_SHARE = 0.2
WEAK_CARRYING_SD = 2.0
PRIOR_SHIFT = 0.2
CHECK_TIMEOUT = 300.0
SEED = 2026
MODES = ("labels", "pseudo-labels")


@dataclass(frozen=True)
class LiveSetup:
    """The served version, the population its samples come from, and the three replicas."""

    registry: Registry
    version: str
    artifact: MapArtifact
    reference: ReferenceStatistics
    population: Population
    replicas: list[LiveServer]

    @property
    def urls(self) -> list[str]:
        return [replica.base_url for replica in self.replicas]


@dataclass(frozen=True)
class LiveSample:
    """One check to ask for: the vectors, their labels by attribute (None: pseudo-labels), the replica asked."""

    vectors: NDArray[np.float32]
    labels: dict[str, list[str]] | None
    replica: int


@dataclass
class Tally:
    """The answers of a series of checks: statuses, rules, what reached a level, and any check not answered."""

    statuses: Counter[str] = field(default_factory=Counter)
    rules: Counter[str] = field(default_factory=Counter)
    reasons: Counter[str] = field(default_factory=Counter)
    errors: list[str] = field(default_factory=list)
    seconds: float = 0.0

    @property
    def checks(self) -> int:
        return sum(self.statuses.values())

    @property
    def alerts(self) -> int:
        return self.statuses["alert"]

    @property
    def alarms(self) -> int:
        """Checks at warn or alert."""
        return self.statuses["warn"] + self.statuses["alert"]

    def add(self, answer: dict[str, Any]) -> None:
        if "error" in answer:
            self.errors.append(str(answer["error"]))
            return
        self.statuses[str(answer["status"])] += 1
        self.rules[str(answer.get("rule", "fixed levels (the answer names no rule)"))] += 1
        self.reasons.update({reason_key(reason) for reason in answer.get("reasons", [])})


def reason_key(reason: str) -> str:
    """What reached a level, without its value: ``"age_bracket: leakage_gap"`` from that attribute's reason."""
    found = re.match(r"((?:[\w&|]+: )?[a-z_]+)", reason)
    return found.group(1) if found else reason[:40]


def rate(count: int, checks: int) -> str:
    """A count as a share, with its exact (Clopper–Pearson) 95% interval, as scipy's binomial test gives it."""
    if checks == 0:
        return "no checks"
    interval = binomtest(count, checks).proportion_ci(confidence_level=0.95, method="exact")
    return f"{count} ({100 * count / checks:.1f}%, 95% interval {100 * interval.low:.1f}–{100 * interval.high:.1f}%)"


def fit_live_version(path: Path, population: Population) -> tuple[Registry, str]:
    """LEACE guarding the pronoun and the age bracket, fitted on the population's fitting rows, alias ``live``."""
    registry = Registry(path)
    sample = LabelledSample(
        embeddings=population.fit_x, attribute=attribute_table(population.fit_labels),
        attribute_key=", ".join(population.fit_labels), task=None, task_key=None,
        files={"harbourline_profiles_large.npz": "0" * 64},
    )  # fmt: skip
    request = FitRequest(
        MethodSpec("leace"), StoreSpec(LIVE, alias=ALIAS), audit=AuditSpec(nonlinear=False, rows=AUDIT_ROWS)
    )
    return registry, fit_version(sample, request, registry=registry).version_id


def replica_of(rng: np.random.Generator) -> int:
    return int(rng.choice(len(TRAFFIC_SHARES), p=TRAFFIC_SHARES))


def _labels(population: Population, rows: NDArray[np.intp]) -> dict[str, list[str]]:
    return {name: values[rows].tolist() for name, values in population.held_labels.items()}


def undrifted(population: Population, size: int, labelled: bool, index: int) -> LiveSample:
    """Check ``index`` of a series: ``size`` held-out rows drawn without replacement, and the replica asked."""
    rng = np.random.default_rng([SEED, 1, size, index])
    rows = rng.choice(population.held_x.shape[0], size, replace=False)
    labels = _labels(population, rows) if labelled else None
    return LiveSample(population.held_x[rows], labels, replica_of(rng))


@dataclass(frozen=True)
class PlantedChange:
    """One planted change: a function of (labelled, index) giving one check's drifted sample, and whether the
    detection target judges it (a weaker strength is reported to show where detection stops)."""

    make: Callable[[bool, int], LiveSample]
    judged: bool = True


def planted_changes(setup: LiveSetup) -> dict[str, PlantedChange]:
    """Each planted change by name."""
    population = setup.population
    direction = hidden_direction(setup.artifact, seed=SEED)
    pronoun = population.held_labels["pronoun"]
    strong = carrying_distance(population.held_x, pronoun)
    weak = WEAK_CARRYING_SD * spread_along(population.held_x, direction)
    classes = [str(c) for c in setup.reference.attributes[0].classes] if setup.reference.attributes else []
    priors = setup.reference.class_priors

    def draw(kind: int, index: int) -> tuple[np.random.Generator, NDArray[np.intp]]:
        rng = np.random.default_rng([SEED, 2, kind, index])
        return rng, rng.choice(population.held_x.shape[0], DETECTION_SIZE, replace=False)

    def mean_shift(labelled: bool, index: int) -> LiveSample:
        rng, rows = draw(1, index)
        shifted = shift_along_leading_axis(population.held_x[rows], setup.reference)
        return LiveSample(shifted, _labels(population, rows) if labelled else None, replica_of(rng))

    def carrying(strength: float, labelled: bool, index: int) -> LiveSample:
        rng, rows = draw(2, index)
        x, _ = carry_along_hidden_direction(
            population.held_x[rows], pronoun[rows], direction, share=CARRYING_SHARE, strength=strength, rng=rng
        )
        return LiveSample(x, _labels(population, rows) if labelled else None, replica_of(rng))

    def prior_shift(labelled: bool, index: int) -> LiveSample:
        rng = np.random.default_rng([SEED, 3, index])
        rows = prior_shifted_rows(pronoun, classes, priors, PRIOR_SHIFT, DETECTION_SIZE, rng)
        return LiveSample(population.held_x[rows], _labels(population, rows) if labelled else None, replica_of(rng))

    carried = f"{CARRYING_SHARE:.0%} carrying the pronoun along a hidden direction"
    return {
        "mean shift of 1 SD along the leading axis": PlantedChange(mean_shift),
        f"{carried} at half its class-mean distance ({strong:.3f})": PlantedChange(partial(carrying, strong)),
        f"{carried} at {WEAK_CARRYING_SD:g} SD ({weak:.3f}; not judged)": PlantedChange(
            partial(carrying, weak), judged=False
        ),
        f"pronoun prior shift of {PRIOR_SHIFT} in total variation": PlantedChange(prior_shift),
    }


async def _ask(urls: Sequence[str], make: Callable[[int], LiveSample], count: int) -> Tally:
    """``count`` checks, each sample made just before it is sent (a series would not fit in memory at once)."""
    tally = Tally()
    clients = [AsyncVeilClient(url, timeout=CHECK_TIMEOUT, retries=0) for url in urls]
    gate = asyncio.Semaphore(CONCURRENCY)

    async def one(index: int) -> dict[str, Any]:
        async with gate:
            sample = make(index)
            try:
                return await clients[sample.replica].drift(LIVE, sample.vectors, sample.labels)
            except VeilError as error:
                return {"error": f"check {index} on replica {sample.replica}: {error}"}

    started = time.monotonic()
    try:
        for answer in await asyncio.gather(*(one(index) for index in range(count))):
            tally.add(answer)
    finally:
        for client in clients:
            await client.aclose()
    tally.seconds = time.monotonic() - started
    return tally


def ask(urls: Sequence[str], make: Callable[[int], LiveSample], count: int) -> Tally:
    return asyncio.run(_ask(urls, make, count))


def _common(tally: Tally) -> str:
    reasons = ", ".join(f"{key} {count}" for key, count in tally.reasons.most_common(4)) or "none"
    rules = ", ".join(f"{rule} ×{count}" for rule, count in tally.rules.items())
    return f"rule: {rules}; reached a level: {reasons}; {tally.seconds:.0f} s"


def false_alarms(setup: LiveSetup, checks: int, mode: str, *, judged: bool) -> Outcome:
    """``checks`` undrifted checks split evenly over :data:`SIZES`, with labels or pseudo-labels."""
    per_size = [checks // len(SIZES) + (position < checks % len(SIZES)) for position in range(len(SIZES))]
    tallies = {
        size: ask(setup.urls, partial(undrifted, setup.population, size, mode == "labels"), k)
        for size, k in zip(SIZES, per_size, strict=True)
    }
    total = Tally()
    for tally in tallies.values():
        total.statuses.update(tally.statuses)
        total.rules.update(tally.rules)
        total.reasons.update(tally.reasons)
        total.errors += tally.errors
        total.seconds += tally.seconds
    by_size = "; ".join(
        f"{size} rows: {t.alerts} alert, {t.statuses['warn']} warn of {t.checks}" for size, t in tallies.items()
    )
    figures = (
        f"{total.checks} undrifted checks ({by_size}); alerts {rate(total.alerts, total.checks)}, "
        f"warn or alert {rate(total.alarms, total.checks)}; {_common(total)}"
    )
    if not judged:
        figures += f"; targets judged from {JUDGED_ALARM_CHECKS} checks in both series"
    problems = total.errors + (alarm_misses(total) if judged else [])
    return Outcome(f"live checks: false alarms, {mode}", not problems, figures, problems)


def alarm_misses(tally: Tally) -> list[str]:
    """The false-alarm targets a series of undrifted checks misses (compared in integers)."""
    misses = []
    if 100 * tally.alerts > ALERT_PERCENT * tally.checks:
        misses.append(f"alerts on {100 * tally.alerts / tally.checks:.1f}% of checks: target {ALERT_PERCENT}%")
    if 100 * tally.alarms > WARN_PERCENT * tally.checks:
        misses.append(f"warn or alert on {100 * tally.alarms / tally.checks:.1f}%: target {WARN_PERCENT}%")
    return misses


def detection_misses(tally: Tally) -> list[str]:
    """The detection target a series of checks of one planted change misses (compared in integers)."""
    if 100 * tally.alerts >= DETECTED_PERCENT * tally.checks:
        return []
    return [f"alerted in {100 * tally.alerts / tally.checks:.0f}% of checks: target {DETECTED_PERCENT}%"]


def detection(setup: LiveSetup, checks: int, mode: str) -> list[Outcome]:
    """``checks`` checks of each planted change at :data:`DETECTION_SIZE` rows."""
    outcomes = []
    for change, planted in planted_changes(setup).items():
        tally = ask(setup.urls, partial(planted.make, mode == "labels"), checks)
        figures = (
            f"{tally.checks} checks at {DETECTION_SIZE} rows: alerted {rate(tally.alerts, tally.checks)}, "
            f"warned {tally.statuses['warn']}, ok {tally.statuses['ok']}; {_common(tally)}"
        )
        judged = planted.judged and tally.checks >= JUDGED_DETECTION_CHECKS
        if not planted.judged:
            figures += "; reported, not judged: where detection stops"
        elif not judged:
            figures += f"; target judged from {JUDGED_DETECTION_CHECKS} checks"
        problems = tally.errors + (detection_misses(tally) if judged else [])
        outcomes.append(Outcome(f"live checks: detects {change}, {mode}", not problems, figures, problems))
    return outcomes


def leaves(value: Any, path: str = "") -> Iterator[tuple[str, Any]]:
    """Every leaf of a JSON answer, by its path."""
    if isinstance(value, dict):
        for key in sorted(value):
            yield from leaves(value[key], f"{path}.{key}" if path else str(key))
    elif isinstance(value, list):
        for position, item in enumerate(value):
            yield from leaves(item, f"{path}[{position}]")
    else:
        yield path, value


def tolerance(a: float, b: float) -> float:
    """Both answers come from the same float32 rows; figures are float64 sums of them, so any difference in the
    order of evaluation moves them by far less than a float32 step of the larger value (and a float64 step of 1
    near zero)."""
    return 4 * float(np.finfo(np.float32).eps) * max(abs(a), abs(b)) + 4 * float(np.finfo(np.float64).eps)


def compare_answers(merged: dict[str, Any], single: dict[str, Any]) -> tuple[int, float, list[str]]:
    """Leaves compared, the largest difference between numbers, and every leaf that differs."""
    first, second = dict(leaves(merged)), dict(leaves(single))
    differ = [f"{path} only in one answer" for path in sorted(set(first) ^ set(second))]
    largest = 0.0
    for path in sorted(set(first) & set(second)):
        a, b = first[path], second[path]
        numbers = all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in (a, b))
        if numbers:
            largest = max(largest, abs(a - b))
            if abs(a - b) > tolerance(a, b):
                differ.append(f"{path}: {a!r} merged, {b!r} on one replica")
        elif a != b:
            differ.append(f"{path}: {a!r} merged, {b!r} on one replica")
    return len(first), largest, differ


def send_traffic(setup: LiveSetup, round_index: int) -> NDArray[np.float32]:
    """:data:`TRAFFIC_ROWS` distinct held-out rows cleaned through ``apply``, split 60/30/10 over the replicas."""
    rng = np.random.default_rng([SEED, 4, round_index])
    rows = rng.choice(setup.population.held_x.shape[0], TRAFFIC_ROWS, replace=False)
    counts = [int(TRAFFIC_ROWS * share) for share in TRAFFIC_SHARES]
    counts[0] += TRAFFIC_ROWS - sum(counts)
    for url, part in zip(setup.urls, np.split(rows, np.cumsum(counts)[:-1]), strict=True):
        with VeilClient(url, batch_size=256) as client:
            client.apply(LIVE, setup.population.held_x[part])
    return setup.population.held_x[rows]


def merged_equals_single(setup: LiveSetup, rounds: int) -> Outcome:
    """Rounds of the merged check over the three replicas, each against the same vectors posted to one replica."""
    posted: list[NDArray[np.float32]] = []

    def fetch(address: str) -> RecentTraffic:
        with VeilClient(address, token=ADMIN_TOKEN, retries=1) as replica:
            return replica.recent(LIVE)

    def post(address: str, vectors: NDArray[np.float32], version: str) -> dict[str, Any]:
        posted.append(vectors)
        with VeilClient(address, timeout=CHECK_TIMEOUT) as replica:
            return replica.drift(LIVE, vectors, version=version)

    sent: set[bytes] = set()
    compared, largest, problems, merged_rows, taken = 0, 0.0, [], [], Counter[str]()
    for round_index in range(rounds):
        sent |= {row.tobytes() for row in send_traffic(setup, round_index)}
        now = time.time() + 3600.0 * round_index  # a slot of its own each round
        outcome = replicas_round(
            setup.registry, LIVE, ReplicaSet(services=tuple(setup.urls)), fetch, post, every=3600.0, now=now
        )
        record = outcome.outcomes[0].record.body
        vectors = posted[-1]
        checker = record["replicas"]["checked_by"]
        other = next(url for url in reversed(setup.urls) if url != checker)
        with VeilClient(other, timeout=CHECK_TIMEOUT) as replica:
            single = replica.drift(LIVE, vectors, version=record["version"])
        leaves_compared, difference, differ = compare_answers(record["report"], single)
        compared += leaves_compared
        largest = max(largest, difference)
        problems += [f"round {round_index}: {text}" for text in differ]
        problems += _merge_problems(record, vectors, round_index)
        if not all(row.tobytes() in sent for row in vectors):
            problems.append(f"round {round_index}: the merged sample holds vectors no replica was sent")
        merged_rows.append(int(vectors.shape[0]))
        taken.update({entry["address"]: entry["merged_rows"] for entry in record["replicas"]["reached"]})
    shares = "/".join(str(taken[url]) for url in setup.urls)
    figures = (
        f"{rounds} rounds of {TRAFFIC_ROWS} vectors sent 60/30/10 (reservoirs of {RESERVOIR_ROWS}); merged samples "
        f"of {', '.join(map(str, merged_rows))} rows ({shares} rows from each replica in all); {compared} answer "
        f"fields compared with the same vectors posted to one replica, largest difference {largest:.1e}"
    )
    return Outcome("live checks: merged over 3 replicas = one replica", not problems, figures, problems)


def _merge_problems(record: dict[str, Any], vectors: NDArray[np.float32], round_index: int) -> list[str]:
    """What is wrong with a merged sample: rows repeated, replicas missing, shares not those of the traffic."""
    problems = []
    replicas = record["replicas"]
    if np.unique(vectors, axis=0).shape[0] != vectors.shape[0]:
        problems.append(f"round {round_index}: the merged sample repeats rows")
    if replicas["unanswered"] or len(replicas["reached"]) != len(TRAFFIC_SHARES):
        problems.append(f"round {round_index}: replicas not reached: {replicas['unanswered']}")
    seen = [entry["traffic_seen"] for entry in replicas["reached"]]
    total, size = sum(seen), sum(entry["merged_rows"] for entry in replicas["reached"])
    for entry in replicas["reached"]:
        # Largest remainder: each replica gives its exact share of the merged rows, rounded up or down.
        if abs(entry["merged_rows"] * total - size * entry["traffic_seen"]) >= total:
            problems.append(f"round {round_index}: {entry['address']} gave {entry['merged_rows']} of {size} rows")
    return problems


def start_replicas(stack: ExitStack, registry: Path, workdir: Path, env: dict[str, str]) -> list[LiveServer]:
    """The three replicas, started at once (each waits for its own ``/readyz``); each stopped when ``stack`` is."""
    managers = [
        live_server(registry, names=[LIVE], log=workdir / f"live-{i}.log", environment=env)
        for i in range(len(TRAFFIC_SHARES))
    ]
    with ThreadPoolExecutor(len(managers)) as pool:
        starting = [pool.submit(manager.__enter__) for manager in managers]
    replicas, failures = [], []
    for manager, started in zip(managers, starting, strict=True):
        try:
            replicas.append(started.result())
        except RuntimeError as error:
            failures.append(error)
        else:
            stack.push(manager.__exit__)
    if failures:
        raise failures[0]
    return replicas


def live_checks(
    workdir: Path, *, fit_rows: int, alarm_checks: int, detection_checks: int, replica_rounds: int
) -> list[Outcome]:
    """The whole group: fit, start three replicas, measure, stop them."""
    population = split_population(fit_rows)
    registry, version = fit_live_version(workdir / "live-registry", population)
    stored = registry.read_version(LIVE, version)
    reference = ReferenceStatistics.from_bytes(stored.files[REFERENCE_FILE])
    env = {
        "VEIL_ADMIN_TOKEN": ADMIN_TOKEN, "VEIL_RESERVOIR_SIZE": str(RESERVOIR_ROWS), "VEIL_POLL_SECONDS": "0",
    }  # fmt: skip
    with ExitStack() as stack:
        replicas = start_replicas(stack, workdir / "live-registry", workdir, env)
        setup = LiveSetup(registry, version, stored.artifact, reference, population, replicas)
        outcomes = [merged_equals_single(setup, replica_rounds)]
        judged = len(MODES) * alarm_checks >= JUDGED_ALARM_CHECKS
        for mode in MODES:
            outcomes.append(false_alarms(setup, alarm_checks, mode, judged=judged))
        for mode in MODES:
            outcomes += detection(setup, detection_checks, mode)
        dead = [replica.base_url for replica in replicas if not replica.alive()]
        if dead:
            outcomes.append(Outcome("live checks: replicas alive", False, "a replica died", dead))
    return outcomes
