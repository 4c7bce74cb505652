"""``kill -9`` of ``veil fit``, ``veil promote`` and ``veil rollback`` at random moments, in a loop.

After every kill the registry must be consistent: every visible version
verifies, every alias names a visible version, the history parses and names
visible versions only.  The kill moments are drawn around each command's
measured duration, so most kills land while it runs (the count is reported).
"""

from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

from reliability.outcome import Outcome
from reliability.workbench import planted_population
from veil.registry import Registry, RegistryError

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


def veil_command(*argv: str | Path) -> list[str]:
    return [sys.executable, "-m", "veil.cli", *(str(a) for a in argv)]


def kill_at(command: list[str], delay: float) -> bool:
    """Start ``command``, SIGKILL it after ``delay`` seconds; True if it was still running when killed."""
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    time.sleep(delay)
    running = process.poll() is None
    if running:
        os.kill(process.pid, signal.SIGKILL)
    process.wait()
    return running


def timed(command: list[str]) -> float:
    started = time.monotonic()
    subprocess.run(command, check=True, capture_output=True)
    return time.monotonic() - started


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
    problems: list[str] = []
    for trial in range(trials):
        if trial % 2 == 0:
            # Most of a short fit is start-up; the moments lean towards its end, where it writes.
            kind, command, delay = "fit", fit, rng.uniform(0.3, 1.05) * fit_seconds
        else:
            kind = "rollback" if trial % 6 == 5 else "promote"
            versions = [v.id for v in registry.versions(NAME)]
            argv = ("rollback", NAME) if kind == "rollback" else ("promote", NAME, rng.choice(versions))
            command = veil_command(*argv, "--registry", registry_path, "--reason", f"trial {trial}")
            delay = rng.uniform(0.5, 1.05) * promote_seconds
        killed[kind] += kill_at(command, delay)
        _, found = consistency_problems(registry)
        problems += [f"after trial {trial} ({kind}): {p}" for p in found]
    # The registry still takes writes: an interrupted move is finished, a new promote works.
    after = subprocess.run(veil_command("promote", NAME, "1", "--registry", registry_path), capture_output=True)
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
        f"(fit {killed['fit']}, promote {killed['promote']}, rollback {killed['rollback']}); "
        f"{count} versions, all verified, every alias on a verified version"
    )
    return Outcome("crash safety: kill -9 loop", not problems, figures, problems)
