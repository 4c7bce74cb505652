"""Killing a writer at any moment never leaves a visible partial version or a broken alias.

Two complementary checks: real ``kill -9`` of ``veil fit`` and ``veil promote``
processes at random moments, and a deterministic crash injected at every
single write the registry makes, on both backends.
"""

from __future__ import annotations

import os
import random
import signal
import subprocess
import sys
import time
import uuid
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from veil.registry import Registry
from veil.registry import storage as storage_module

from .conftest import planted
from .test_registry import version_files

NAME = "crash-test"


def assert_consistent(registry: Registry) -> int:
    """Every visible version verifies, every alias names one of them, the history parses; returns the version count."""
    if not registry.names():
        assert registry.storage.list(f"{NAME}/aliases") == []
        return 0
    results = registry.verify(NAME)
    assert all(r.ok for r in results), [r.problem for r in results if not r.ok]
    visible = {v.id for v in registry.versions(NAME)}
    for state in registry.aliases(NAME).values():
        assert state.version in visible
    for event in registry.history(NAME):
        assert event.to_version in visible
    return len(visible)


def veil_command(*argv: str | Path) -> list[str]:
    return [sys.executable, "-m", "veil.cli", *(str(a) for a in argv)]


def kill_at_random(command: list[str], delay: float) -> bool:
    """Start ``command``, SIGKILL it after ``delay`` seconds; True if it was still running when killed."""
    process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    time.sleep(delay)
    running = process.poll() is None
    if running:
        os.kill(process.pid, signal.SIGKILL)
    process.wait()
    return running


def test_kill_9_during_fit_and_promote_never_breaks_the_registry(tmp_path: Path) -> None:
    x, z = planted(n=600, d=24, seed=8)
    np.savez(tmp_path / "sample.npz", embedding=x.astype(np.float32), group=np.array(["a", "b"])[z])
    registry_path = tmp_path / "registry"
    fit = veil_command(
        "fit", "--data", tmp_path / "sample.npz", "--attribute", "group", "--method", "leace",
        "--name", NAME, "--registry", registry_path, "--probes", "linear", "--alias", "live",
    )  # fmt: skip
    started = time.monotonic()
    subprocess.run(fit, check=True, capture_output=True)
    fit_seconds = time.monotonic() - started
    subprocess.run(fit, check=True, capture_output=True)
    rng = random.Random(20261202)
    registry = Registry(registry_path)
    killed = trials = 0
    for _ in range(12):
        # Most of a short fit is start-up; bias the moments towards its end, where it writes.
        killed += kill_at_random(fit, rng.uniform(0.3, 1.05) * fit_seconds)
        trials += 1
        assert_consistent(registry)
    promote_seconds = 0.0
    for trial in range(12):
        versions = [v.id for v in registry.versions(NAME)]
        if trial % 3 == 2:
            command = veil_command("rollback", NAME, "--registry", registry_path)
        else:
            command = veil_command(
                "promote", NAME, rng.choice(versions), "--registry", registry_path, "--reason", f"trial {trial}"
            )
        if promote_seconds == 0.0:
            started = time.monotonic()
            subprocess.run(command, capture_output=True)
            promote_seconds = time.monotonic() - started
            continue
        killed += kill_at_random(command, rng.uniform(0.5, 1.05) * promote_seconds)
        trials += 1
        assert_consistent(registry)
    print(f"kill -9: {killed} of {trials} kills hit a running veil fit or promote; the registry stayed consistent")
    assert trials >= 20
    # Most trials must have killed a live process, or the test would prove nothing.
    assert killed >= trials // 2, f"only {killed} of {trials} kills hit a running process"
    # And the registry still takes writes: an interrupted move is finished, a new promote works.
    subprocess.run(veil_command("promote", NAME, "1", "--registry", registry_path), check=True, capture_output=True)
    assert_consistent(registry)


def test_two_concurrent_promotes_are_both_recorded_in_order(tmp_path: Path) -> None:
    registry = Registry(tmp_path / "registry")
    first, second = (registry.add_version(NAME, version_files(seed)) for seed in (1, 2))
    commands = [
        veil_command("promote", NAME, version, "--registry", tmp_path / "registry", "--reason", f"by {version}")
        for version in (first, second)
    ]
    processes = [subprocess.Popen(c, stdout=subprocess.PIPE, stderr=subprocess.PIPE) for c in commands]
    for process in processes:
        _, err = process.communicate(timeout=120)
        assert process.returncode == 0, err
    history = registry.history(NAME)
    assert [e.event for e in history] == [1, 2]
    assert {e.to_version for e in history} == {first, second}
    assert history[0].from_version is None
    assert history[1].from_version == history[0].to_version
    assert registry.resolve(NAME, "live") == history[1].to_version


class SimulatedCrash(BaseException):
    """Raised in place of a write, as if the process died there."""


def _operations(registry: Registry) -> None:
    first = registry.add_version(NAME, version_files(1))
    registry.promote(NAME, first)
    second = registry.add_version(NAME, version_files(2))
    registry.promote(NAME, second)
    registry.rollback(NAME)


def _crash_on_call(k: int, counter: list[int]) -> Callable[[Callable[..., Any]], Callable[..., Any]]:
    def wrap(original: Callable[..., Any]) -> Callable[..., Any]:
        def crashing(*args: Any, **kwargs: Any) -> Any:
            counter[0] += 1
            if counter[0] == k:
                raise SimulatedCrash
            return original(*args, **kwargs)

        return crashing

    return wrap


@pytest.mark.parametrize("backend", ["local", "memory"])
def test_a_crash_at_every_single_write_leaves_a_consistent_registry(
    backend: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    crash_points = 0
    for k in range(1, 200):
        url = str(tmp_path / f"r{k}") if backend == "local" else f"memory://veil-crash/{uuid.uuid4().hex}"
        registry = Registry(url)
        counter = [0]
        wrap = _crash_on_call(k, counter)
        with monkeypatch.context() as patch:
            if backend == "local":
                # Every primitive that changes the disk: file writes, renames, links.
                patch.setattr(storage_module, "_write_synced", wrap(storage_module._write_synced))
                for name in ("rename", "replace", "link"):
                    patch.setattr(storage_module.os, name, wrap(getattr(os, name)))
            else:
                fs = registry.storage.fs  # type: ignore[attr-defined]
                patch.setattr(fs, "pipe_file", wrap(fs.pipe_file))
                patch.setattr(fs, "open", wrap(fs.open))
            try:
                _operations(registry)
            except SimulatedCrash:
                crashed = True
            else:
                crashed = False
        if not crashed:
            break
        crash_points += 1
        count = assert_consistent(Registry(url))
        assert count <= 2
        # The next writer recovers: it can still promote and roll back.
        if count:
            Registry(url).promote(NAME, "1")
            assert_consistent(Registry(url))
    # Sanity: the sequence made many writes, and the loop reached the point where none crashed.
    print(f"{backend}: a crash injected at each of {crash_points} writes left the registry consistent")
    assert crash_points >= 8
