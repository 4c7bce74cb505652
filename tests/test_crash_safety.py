"""Killing a writer at any moment never leaves a visible partial version or a broken alias.

A deterministic crash injected at every single write the registry makes, on
both backends, and two racing promotes.  The real ``kill -9`` loop lives in
``reliability/crashloop.py`` (a short run in ``tests/test_reliability.py``).
"""

from __future__ import annotations

import os
import subprocess
import uuid
from collections.abc import Callable
from pathlib import Path
from typing import Any

import pytest

from reliability.crashloop import NAME, consistency_problems, veil_command
from veil.registry import Registry
from veil.registry import storage as storage_module

from .test_registry import version_files


def assert_consistent(registry: Registry) -> int:
    """Every visible version verifies, every alias names one of them, the history parses; returns the version count."""
    count, problems = consistency_problems(registry, NAME)
    assert problems == []
    return count


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
        # The next writer recovers: it finishes any interrupted move and can still promote (to an alias of its
        # own: a move to where an alias already points is refused).
        if count:
            Registry(url).promote(NAME, "1", alias="recovered")
            assert_consistent(Registry(url))
    # Sanity: the sequence made many writes, and the loop reached the point where none crashed.
    print(f"{backend}: a crash injected at each of {crash_points} writes left the registry consistent")
    assert crash_points >= 8
