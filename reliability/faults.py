"""Faults injected into the registry of a live server: it keeps serving the last good version and says so.

For each fault the alias is moved to a version the service cannot take
(corrupted, incomplete, of another dimension, or a registry it cannot read),
the service is asked to reload, and the check reads what it answers: the old
version keeps serving (under a steady background load that must see no
error), ``/readyz`` stays 200 and names the eraser as stale, ``/metrics``
shows the refusal.  Then the fault is repaired and the next reload must
take the version in.
"""

from __future__ import annotations

import asyncio
import threading
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import httpx
from prometheus_client.parser import text_string_to_metric_families

from reliability.expected import ExpectedOutputs
from reliability.load import APPLY, sample_batches
from reliability.loadgen import LoadPlan, LoadResult, run_load
from reliability.outcome import Outcome
from reliability.workbench import PROFILES, ServiceRegistry, planted_population, sample_of
from veil.fitting.job import fit_version
from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, StoreSpec
from veil.registry import Registry
from veil.samples.harbourline import load_harbourline_profiles


@dataclass(frozen=True)
class Fault:
    """A way to break the registry under a running service; injecting it returns its repair."""

    description: str
    #: The version the alias is moved to before the fault (None: the alias stays where it is).
    target: str | None
    inject: Callable[[], Callable[[], None]]
    #: Whether the repaired alias names the target (else the repair moves the alias back).
    serves_target_after_repair: bool


def _version_dir(registry: ServiceRegistry, version: str) -> Path:
    return registry.path / PROFILES / "versions" / version


def _saving(path: Path) -> tuple[bytes, Callable[[], None]]:
    original = path.read_bytes()

    def restore() -> None:
        path.write_bytes(original)

    return original, restore


def flip_byte(path: Path) -> Callable[[], None]:
    """Flip one byte in the middle of ``path``; returns the repair."""
    original, restore = _saving(path)
    middle = len(original) // 2
    path.write_bytes(original[:middle] + bytes([original[middle] ^ 0xFF]) + original[middle + 1 :])
    return restore


def delete_file(path: Path) -> Callable[[], None]:
    _, restore = _saving(path)
    path.unlink()
    return restore


def truncate_file(path: Path) -> Callable[[], None]:
    original, restore = _saving(path)
    path.write_bytes(original[: len(original) // 2])
    return restore


def make_unreadable(root: Path) -> Callable[[], None]:
    """Put a plain file where the registry directory was (as a lost mount looks even to root); returns the repair."""
    away = root.with_name(root.name + ".away")
    root.rename(away)
    root.write_text("not a registry\n")

    def restore() -> None:
        root.unlink()
        away.rename(root)

    return restore


def prepare_versions(registry: ServiceRegistry) -> tuple[str, str]:
    """Store a next version of the served eraser and one of another dimension; returns their ids."""
    store = Registry(registry.path)
    profiles = load_harbourline_profiles()
    sample = sample_of(profiles.embedding, profiles.pronoun, "pronoun")
    following = fit_version(
        sample,
        FitRequest(MethodSpec("leace", seed=7), StoreSpec(PROFILES), audit=AuditSpec(nonlinear=False)),
        registry=store,
    )
    x, z = planted_population(3000, seed=3)
    narrow = fit_version(
        sample_of(x, z, "pronoun"),
        FitRequest(MethodSpec("leace"), StoreSpec(PROFILES), audit=AuditSpec(nonlinear=False)),
        registry=store,
    )
    return following.version_id, narrow.version_id


def faults_for(registry: ServiceRegistry, following: str, narrow: str) -> list[Fault]:
    folder = _version_dir(registry, following)
    store = Registry(registry.path)

    def move_back() -> None:
        store.rollback(PROFILES, reason="the other dimension was refused", allow_dimension_change=True)

    def refused_dimension() -> Callable[[], None]:
        return move_back  # the fault is the alias move itself; the repair moves it back

    return [
        Fault("flipped byte in the next version's arrays", following, lambda: flip_byte(folder / "arrays.npz"), True),
        Fault("file deleted from the next version", following, lambda: delete_file(folder / "reference.npz"), True),
        Fault("truncated card of the next version", following, lambda: truncate_file(folder / "card.json"), True),
        Fault("alias moved to a version of another dimension", narrow, refused_dimension, False),
        Fault("registry unreadable (a file where its directory was)", None, lambda: make_unreadable(registry.path),
              False),
    ]  # fmt: skip


def reload_failing_gauge(metrics_text: str, name: str) -> float | None:
    for family in text_string_to_metric_families(metrics_text):
        if family.name == "veil_reload_failing":
            for sample in family.samples:
                if sample.labels.get("name") == name:
                    return float(sample.value)
    return None


class _Steps:
    """Collects the problems of one fault's check, with the figures seen on the way."""

    def __init__(self) -> None:
        self.problems: list[str] = []
        self.seen: list[str] = []

    def expect(self, condition: bool, problem: str) -> None:
        if not condition:
            self.problems.append(problem)


def check_fault(client: httpx.Client, fault: Fault, registry: ServiceRegistry, *, alive: Callable[[], bool]) -> Outcome:
    store = Registry(registry.path)
    good = registry.leace
    steps = _Steps()
    if fault.target is not None:
        store.promote(PROFILES, fault.target, reason=fault.description, allow_dimension_change=True, force=True)
    repair = fault.inject()
    try:
        reload = client.post("/v1/admin/reload")
        steps.expect(reload.status_code == 200, f"reload answered {reload.status_code}")
        outcome = reload.json() if reload.status_code == 200 else {}
        problem = outcome.get("failed", {}).get(PROFILES)
        steps.expect(problem is not None, "the reload did not report the fault")
        steps.expect(outcome.get("serving", {}).get(PROFILES) == good, "the last good version is no longer served")
        ready = client.get("/readyz")
        steps.expect(ready.status_code == 200, f"/readyz answered {ready.status_code} while the old version serves")
        steps.expect(PROFILES in ready.json().get("stale", []), "/readyz does not name the eraser as stale")
        gauge = reload_failing_gauge(client.get("/metrics").text, PROFILES)
        steps.expect(gauge == 1.0, f"veil_reload_failing is {gauge}, not 1")
        payload = {"vectors": sample_batches(2, 1)[0].tolist()}
        applied = client.post(APPLY, json=payload)
        steps.expect(
            applied.status_code == 200 and applied.headers.get("x-veil-version") == good,
            f"apply answered {applied.status_code} {applied.headers.get('x-veil-version')}",
        )
        if fault.target is not None:
            pinned = client.post(APPLY, params={"version": fault.target}, json=payload)
            code = pinned.json().get("error", {}).get("code")
            steps.expect(code == "version_unavailable", f"a request pinned to it answered {pinned.status_code} {code}")
            steps.seen.append(f"pinned {pinned.status_code} {code}")
        steps.seen.insert(0, f"refused ({str(problem)[:60]}…)")
    finally:
        repair()
    repaired = client.post("/v1/admin/reload").json()
    expected_now = fault.target if fault.serves_target_after_repair else good
    steps.expect(not repaired.get("failed"), f"the reload after repair failed: {repaired.get('failed')}")
    steps.expect(repaired.get("serving", {}).get(PROFILES) == expected_now, "the repaired version was not taken in")
    steps.expect(client.get("/readyz").json().get("stale") == [], "/readyz still reports stale after repair")
    steps.expect(reload_failing_gauge(client.get("/metrics").text, PROFILES) == 0.0, "veil_reload_failing stayed 1")
    steps.seen.append(f"after repair: serving {expected_now}")
    if fault.serves_target_after_repair:
        store.rollback(PROFILES, reason="back to the good version after a fault check")
        steps.expect(client.post("/v1/admin/reload").json()["serving"][PROFILES] == good, "could not roll back")
    steps.expect(alive(), "the server process died")
    return Outcome(f"fault: {fault.description}", not steps.problems, "; ".join(steps.seen), steps.problems)


def faults_while_serving(
    base_url: str, registry: ServiceRegistry, *, admin_token: str, alive: Callable[[], bool], clients: int = 4
) -> list[Outcome]:
    """Run every fault in turn under a steady background load; the load must see no failure at all."""
    following, narrow = prepare_versions(registry)
    batches = sample_batches(4)
    expected = ExpectedOutputs(Registry(registry.path), PROFILES, batches)
    expected.preload(registry.leace, following)
    stop = threading.Event()
    results: list[LoadResult] = []

    def background() -> None:
        plan = LoadPlan(clients=clients, requests=10**7, batch=4, deadline_s=600.0)
        results.append(asyncio.run(run_load(base_url, APPLY, plan, batches, check=expected.check, stop=stop.is_set)))

    load = threading.Thread(target=background, name="background-load")
    load.start()
    outcomes = []
    headers = {"Authorization": f"Bearer {admin_token}"}
    try:
        with httpx.Client(base_url=base_url, headers=headers, timeout=30.0) as client:
            for fault in faults_for(registry, following, narrow):
                outcomes.append(check_fault(client, fault, registry, alive=alive))
    finally:
        stop.set()
        load.join()
    result = results[0]
    outcomes.append(
        Outcome(
            "faults: background load",
            result.errors == 0 and result.completed > 0,
            f"{result.completed} requests while the faults ran, {result.errors} errors",
            result.problems,
        )
    )
    return outcomes
