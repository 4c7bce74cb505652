"""``kill -9`` of ``veil fit``, ``veil promote`` and ``veil rollback`` in a loop, in two ways.

Half the kills come at a random moment around the command's measured
duration; most of those land while it starts or computes, since its writes
take a few milliseconds at its end.  The other half wait until the command
has begun writing (a fit's staging folder appears; a move's history event
appears) and kill it within a few milliseconds.  After every kill the
registry must be consistent: every visible version verifies, every alias
names a visible version, the history names visible versions only.  What the
killed writers left behind (staging folders, recorded but unfinished alias
moves) is counted: none of it may be visible to readers.
"""

from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

from reliability.outcome import Outcome
from reliability.workbench import planted_population
from veil.registry import SEAL_FILE, Registry, RegistryError
from veil.registry.storage import STAGING_DIR

NAME = "crash-test"


def consistency_problems(registry: Registry, name: str = NAME) -> tuple[int, list[str]]:
    """The number of visible versions of ``name``, and every broken promise found."""
    try:
        if name not in registry.names():
            stray = registry.storage.list(f"{name}/aliases")
            return 0, [f"aliases without versions: {stray}"] if stray else []
        problems = [f"{r.version}: {r.problem}" for r in registry.verify(name) if not r.ok]
        visible = {v.id for v in registry.versions(name)}
        problems += [
            f"alias {alias} names {state.version}, which is not visible"
            for alias, state in registry.aliases(name).items()
            if state.version not in visible
        ]
        problems += [f"history event {e.event} names {e.to_version}" for e in registry.history(name)
                     if e.to_version not in visible]  # fmt: skip
    except (RegistryError, OSError, ValueError) as error:
        return 0, [f"the registry cannot be read: {error}"]
    return len(visible), problems


def traces_of_interrupted_writes(registry: Registry, name: str = NAME) -> set[str]:
    """What writers killed mid-write left, invisible to readers: staged or unsealed versions, unfinished moves."""
    partial = {f"partial {entry}" for entry in registry.storage.list(f"{name}/{STAGING_DIR}")}
    partial |= {
        f"partial {entry}"
        for entry in registry.storage.list(f"{name}/versions")
        if not registry.storage.exists(f"{name}/versions/{entry}/{SEAL_FILE}")
    }
    return partial | {f"unfinished move {e.event}" for e in registry.history(name) if not e.applied}


def veil_command(*argv: str | Path) -> list[str]:
    return [sys.executable, "-m", "veil.cli", *(str(a) for a in argv)]


def kill_at(command: list[str], delay: float) -> bool:
    """Start ``command``, SIGKILL it after ``delay`` seconds; True if it was still running when killed."""
    return kill_when(command, lambda: True, delay)


def kill_when(command: list[str], writing: Callable[[], bool], delay: float, timeout: float = 60.0) -> bool:
    """Start ``command``; once ``writing()`` is true, SIGKILL it ``delay`` seconds later.

    True if it was killed while running; False if it ended first.
    """
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + timeout
    while process.poll() is None and time.monotonic() < deadline:
        if writing():
            time.sleep(delay)
            break
        time.sleep(0.0002)
    running = process.poll() is None
    if running:
        os.kill(process.pid, signal.SIGKILL)
    process.wait()
    return running


def new_entry_in(folder: Path) -> Callable[[], bool]:
    """True once ``folder`` holds an entry it did not hold when this was called."""
    before = set(folder.iterdir()) if folder.is_dir() else set()
    return lambda: folder.is_dir() and bool(set(folder.iterdir()) - before)


def timed(command: list[str]) -> float:
    started = time.monotonic()
    subprocess.run(command, check=True, capture_output=True)
    return time.monotonic() - started


def _not_live(registry: Registry) -> list[str]:
    """The versions a promote of ``live`` can move to: every one but where it points (a no-op move is refused).

    Where it points once a move a kill interrupted is finished, as the next writer finishes it first.
    """
    unfinished = [event for event in registry.history(NAME) if event.alias == "live" and not event.applied]
    live = registry.alias(NAME, "live")
    target = unfinished[-1].to_version if unfinished else None if live is None else live.version
    return [v.id for v in registry.versions(NAME) if v.id != target]


def crash_loop(workdir: Path, *, trials: int, seed: int = 20261202) -> Outcome:
    """Half the trials kill a fit, half a promote or rollback; the registry is checked after each."""
    x, z = planted_population(600, seed=8, d=24)
    np.savez(workdir / "sample.npz", embedding=x, group=z)
    registry_path = workdir / "registry"
    fit = veil_command(
        "fit", "--data", workdir / "sample.npz", "--attribute", "group", "--method", "leace",
        "--name", NAME, "--registry", registry_path, "--probes", "linear", "--alias", "live",
    )  # fmt: skip
    fit_seconds = timed(fit)
    timed(fit)
    registry = Registry(registry_path)
    rng = random.Random(seed)
    promote_seconds = timed(veil_command("promote", NAME, "1", "--registry", registry_path))
    killed = {"fit": 0, "promote": 0, "rollback": 0}
    inside_writes = 0
    problems: list[str] = []
    traces: set[str] = set()
    staging, history = registry_path / NAME / STAGING_DIR, registry_path / NAME / "history"
    for trial in range(trials):
        if trial % 2 == 0:
            # Most of a short fit is start-up; the moments lean towards its end, where it writes.
            kind, command, delay = "fit", fit, rng.uniform(0.3, 1.05) * fit_seconds
        else:
            kind = "rollback" if trial % 6 == 5 else "promote"
            argv = ("rollback", NAME) if kind == "rollback" else ("promote", NAME, rng.choice(_not_live(registry)))
            command = veil_command(*argv, "--registry", registry_path, "--reason", f"trial {trial}")
            delay = rng.uniform(0.5, 1.05) * promote_seconds
        if (trial // 2) % 2 == 1:
            # A fit's writes start with its staging folder; a move's with its history event, which the alias
            # follows within a millisecond, so half the moves are killed the moment the event appears.
            if kind == "fit":
                writing, delay = new_entry_in(staging), rng.uniform(0.0, 0.004)
            else:
                writing, delay = new_entry_in(history), rng.choice([0.0, rng.uniform(0.0, 0.002)])
            hit = kill_when(command, writing, delay)
            inside_writes += hit
        else:
            hit = kill_at(command, delay)
        killed[kind] += hit
        traces |= traces_of_interrupted_writes(registry)
        _, found = consistency_problems(registry)
        problems += [f"after trial {trial} ({kind}): {p}" for p in found]
    # The registry still takes writes: an interrupted move is finished, a new promote works.
    after = subprocess.run(
        veil_command("promote", NAME, _not_live(registry)[0], "--registry", registry_path), capture_output=True
    )
    if after.returncode != 0:
        problems.append(f"promote after the loop failed: {after.stderr.decode()[-300:]}")
    count, found = consistency_problems(registry)
    problems += found
    hits = sum(killed.values())
    # Most kills must land on a live process, or the loop proves nothing.
    if hits < trials // 2:
        problems.append(f"only {hits} of {trials} kills hit a running process")
    figures = (
        f"{trials} kill -9 trials, {hits} hit a running process "
        f"(fit {killed['fit']}, promote {killed['promote']}, rollback {killed['rollback']}; "
        f"{inside_writes} once it had begun writing); {len(traces)} left traces of an interrupted write "
        f"({sum(t.startswith('partial') for t in traces)} unsealed versions, "
        f"{sum(t.startswith('unfinished') for t in traces)} unfinished moves, none visible to readers); "
        f"{count} versions at the end, all verified, every alias on a verified version"
    )
    return Outcome("crash safety: kill -9 loop", not problems, figures, problems)
