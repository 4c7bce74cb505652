"""Throughput and latency under concurrent load, and promote/rollback cycles while the load runs."""

from __future__ import annotations

import asyncio
import time
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from reliability.expected import ExpectedOutputs
from reliability.loadgen import LoadPlan, LoadResult, run_load
from reliability.outcome import Outcome
from reliability.workbench import PROFILES, ServiceRegistry
from veil.registry import Registry
from veil.samples.harbourline import load_harbourline_profiles

APPLY = f"/v1/erasers/{PROFILES}/apply"
DISTINCT_BATCHES = 8


def sample_batches(batch: int, count: int = DISTINCT_BATCHES) -> list[NDArray[np.float32]]:
    """``count`` different batches of real embeddings from the committed sample."""
    embeddings = load_harbourline_profiles().embedding.astype(np.float32)
    rng = np.random.default_rng(batch)
    return [embeddings[rng.choice(embeddings.shape[0], size=batch, replace=False)] for _ in range(count)]


def describe(result: LoadResult) -> str:
    return (
        f"{result.completed} requests, {result.plan.clients} clients: {result.requests_per_second:,.0f} req/s, "
        f"{result.vectors_per_second:,.0f} vectors/s, p50 {result.percentile_ms(50):.1f} ms, "
        f"p99 {result.percentile_ms(99):.1f} ms, {result.errors} errors"
    )


@dataclass(frozen=True)
class LoadCell:
    batch: int
    wire: str
    requests: int


def measure_load(base_url: str, registry: ServiceRegistry, cells: Sequence[LoadCell], *, clients: int) -> list[Outcome]:
    """One run per cell against the live alias; every answer is checked against the stored artifact."""
    outcomes = []
    for cell in cells:
        batches = sample_batches(cell.batch)
        expected = ExpectedOutputs(Registry(registry.path), PROFILES, batches)
        expected.preload(registry.leace)
        plan = LoadPlan(clients=clients, requests=cell.requests, batch=cell.batch, wire=cell.wire)
        result = asyncio.run(run_load(base_url, APPLY, plan, batches, check=expected.check))
        passed = result.errors == 0 and result.completed == cell.requests
        outcomes.append(Outcome(f"load: batch {cell.batch}, {cell.wire}", passed, describe(result), result.problems))
    return outcomes


def rollback_under_load(
    base_url: str,
    registry: ServiceRegistry,
    *,
    cycles: int,
    clients: int,
    batch: int = 8,
    dwell_s: float = 0.2,
    switch_timeout: float = 15.0,
) -> Outcome:
    """Promote another version and roll back ``cycles`` times while ``clients`` post batches without pause.

    Each move waits until an answer from the new version has been seen, then
    ``dwell_s`` more, so every cycle is really served; every answer must
    match the version its header names.
    """
    store = Registry(registry.path)
    batches = sample_batches(batch)
    expected = ExpectedOutputs(store, PROFILES, batches)
    expected.preload(registry.leace, registry.meanproj)
    seen: list[tuple[float, str]] = []
    problems: list[str] = []
    done = False

    def check(index: int, output: NDArray[np.floating], version: str) -> str | None:
        seen.append((time.perf_counter(), version))
        return expected.check(index, output, version)

    async def served_after(version: str, moment: float) -> bool:
        deadline = time.perf_counter() + switch_timeout
        while time.perf_counter() < deadline:
            if any(at > moment and v == version for at, v in seen[-64:]):
                return True
            await asyncio.sleep(0.02)
        return False

    async def move_aliases() -> int:
        nonlocal done
        moves = 0
        try:
            for cycle in range(cycles):
                for target in (registry.meanproj, registry.leace):
                    moment = time.perf_counter()
                    if target == registry.meanproj:
                        await asyncio.to_thread(
                            store.promote, PROFILES, target, reason=f"load cycle {cycle}", force=True
                        )
                    else:
                        await asyncio.to_thread(store.rollback, PROFILES, reason=f"load cycle {cycle}")
                    moves += 1
                    if not await served_after(target, moment):
                        problems.append(f"cycle {cycle}: {target} was not served within {switch_timeout:.0f} s")
                    await asyncio.sleep(dwell_s)
        finally:
            done = True
        return moves

    async def both() -> tuple[LoadResult, int]:
        plan = LoadPlan(clients=clients, requests=10**7, batch=batch, wire="npy", deadline_s=60.0 + cycles * 10.0)
        load = asyncio.create_task(run_load(base_url, APPLY, plan, batches, check=check, stop=lambda: done))
        moves = await move_aliases()
        return await load, moves

    result, moves = asyncio.run(both())
    completed_cycles = moves // 2
    passed = result.errors == 0 and not problems and completed_cycles == cycles
    figures = (
        f"{completed_cycles} promote/rollback cycles under {describe(result)}; "
        f"{result.switches} version switches seen, answers by version {dict(result.versions)}"
    )
    return Outcome("rollback under load", passed, figures, [*problems, *result.problems])
