"""The live-check history: patrol rounds recorded once per slot, against a fake and a real ``veil serve``."""

from __future__ import annotations

import json
import os
import random
import shutil
import signal
import subprocess
import sys
import time
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest

from reliability.server import live_server
from veil.errors import DataError
from veil.patrol.loop import run_patrol
from veil.patrol.rounds import CHECKS, PostedSample, check_history, patrol_round
from veil.registry import Registry
from veil.samples.harbourline import load_harbourline_profiles
from veil_client import VeilClient, VeilClientError, VeilTransportError

from .service_fixtures import PROFILES, ServiceRegistry
from .test_cli import run

SLOT = 60.0
T0 = 1_800_000_000.0  # a slot boundary: 1.8e9 is a multiple of 60


def _report(version: str, status: str = "ok") -> dict[str, Any]:
    return {"version": version, "status": status, "reasons": [] if status == "ok" else ["mean_shift 2.0"], "rows": 50}


@pytest.fixture
def registry(service_registry: ServiceRegistry, tmp_path: Path) -> Registry:
    shutil.copytree(service_registry.path, tmp_path / "registry")
    return Registry(tmp_path / "registry")


def test_one_record_per_slot_and_a_retried_round_finds_it(
    registry: Registry, service_registry: ServiceRegistry
) -> None:
    calls: list[str] = []

    def check(name: str, sample: PostedSample | None) -> dict[str, Any]:
        calls.append(name)
        return _report(service_registry.leace)

    first = patrol_round(registry, PROFILES, check, service="s", sample=None, every=SLOT, now=T0 + 5)
    again = patrol_round(registry, PROFILES, check, service="s", sample=None, every=SLOT, now=T0 + 59)
    later = patrol_round(registry, PROFILES, check, service="s", sample=None, every=SLOT, now=T0 + 61)
    assert not first.already_stored
    assert again.already_stored
    assert again.record == first.record
    assert len(calls) == 2  # the retried round found its slot recorded and did not ask the service again
    assert (first.record.number, later.record.number) == (1, 2)
    assert first.record.body["slot"] == "2027-01-15T08:00:00+00:00"
    assert first.record.version == service_registry.leace


def test_history_is_in_check_order_across_versions_and_filtered_by_time(
    registry: Registry, service_registry: ServiceRegistry
) -> None:
    versions = iter([service_registry.leace, service_registry.meanproj, service_registry.leace])
    statuses = iter(["ok", "alert", "warn"])

    def check(name: str, sample: PostedSample | None) -> dict[str, Any]:
        return _report(next(versions), next(statuses))

    for minute in range(3):
        patrol_round(registry, PROFILES, check, service="s", sample=None, every=SLOT, now=T0 + 60 * minute)
    history = check_history(registry, PROFILES)
    assert [record.body["status"] for record in history] == ["ok", "alert", "warn"]
    assert [record.version for record in history] == [service_registry.leace, service_registry.meanproj,
                                                      service_registry.leace]  # fmt: skip
    since = datetime.fromtimestamp(T0 + 60, UTC)
    assert [record.body["status"] for record in check_history(registry, PROFILES, since=since)] == ["alert", "warn"]


class _Clock:
    """A clock the patrol's sleeps move forward, so a loop of rounds takes no real time."""

    def __init__(self) -> None:
        self.now = T0 + 1

    def time(self) -> float:
        return self.now

    def sleep(self, seconds: float) -> None:
        self.now += seconds


def _patrol_with(
    monkeypatch: pytest.MonkeyPatch, registry: Registry, answers: list[Any], rounds: int
) -> tuple[int, list[str]]:
    """Run the loop against a fake service that gives ``answers`` in turn (an exception is raised)."""
    said: list[str] = []
    clock = _Clock()
    pending = iter(answers)

    def fake_drift(*args: Any, **kwargs: Any) -> dict[str, Any]:
        answer = next(pending)
        if isinstance(answer, Exception):
            raise answer
        return dict(answer)

    monkeypatch.setattr(VeilClient, "drift", fake_drift)
    summary = run_patrol(
        registry, PROFILES, service="http://127.0.0.1:9", token=None, sample=None, every=SLOT, rounds=rounds,
        say=said.append, clock=clock.time, sleep=clock.sleep,
    )  # fmt: skip
    return summary.recorded, said


def test_the_loop_skips_a_round_the_service_cannot_answer_and_records_the_others(
    monkeypatch: pytest.MonkeyPatch, registry: Registry, service_registry: ServiceRegistry
) -> None:
    answers = [
        VeilClientError(409, "no_traffic", "this replica has seen no traffic yet"),
        VeilTransportError("connection refused"),
        _report(service_registry.leace),
    ]
    recorded, said = _patrol_with(monkeypatch, registry, answers, rounds=3)
    assert recorded == 1
    assert "nothing to check yet" in said[0]
    assert "round skipped, the service did not answer" in said[1]
    assert said[2].endswith("ok by fixed levels, recorded as check 1")  # a report without a rule: fixed levels
    history = check_history(registry, PROFILES)
    assert [record.body["slot"] for record in history] == ["2027-01-15T08:02:00+00:00"]  # the third slot


def test_the_last_round_raises_and_a_refusal_stops_the_patrol(
    monkeypatch: pytest.MonkeyPatch, registry: Registry
) -> None:
    with pytest.raises(VeilTransportError):
        _patrol_with(monkeypatch, registry, [VeilTransportError("connection refused")], rounds=1)
    with pytest.raises(DataError, match="the service refused the check: 404 unknown_eraser"):
        _patrol_with(monkeypatch, registry, [VeilClientError(404, "unknown_eraser", "no such eraser")], rounds=3)
    assert check_history(registry, PROFILES) == []


def _traffic(base: str, vectors: np.ndarray) -> None:
    with httpx.Client(base_url=base, timeout=30.0) as client:
        for start in range(0, vectors.shape[0], 500):
            response = client.post(
                f"/v1/erasers/{PROFILES}/apply", json={"vectors": vectors[start : start + 500].tolist()}
            )
            assert response.status_code == 200


def _next_slot(every: float) -> None:
    time.sleep(every - time.time() % every + 0.05)


def test_a_real_service_whose_traffic_drifts_halfway(service_registry: ServiceRegistry, tmp_path: Path) -> None:
    registry = tmp_path / "registry"
    shutil.copytree(service_registry.path, registry)
    embeddings = load_harbourline_profiles().embedding
    spread = float(np.sqrt(np.var(embeddings, axis=0).sum()))
    direction = np.random.default_rng(7).normal(size=embeddings.shape[1])
    shifted = (embeddings + 0.5 * spread * direction / np.linalg.norm(direction)).astype(np.float32)
    environment = {"VEIL_RESERVOIR_SIZE": "600"}
    with live_server(registry, names=[PROFILES], log=tmp_path / "server.log", environment=environment) as live:
        patrol = ("patrol", PROFILES, "--service", live.base_url, "--registry", registry, "--once", "--every", "1")
        quiet = run(*patrol)
        assert quiet.code == 0, quiet.err
        assert "nothing to check yet" in quiet.out  # no traffic has reached this replica
        _traffic(live.base_url, embeddings[:600])
        _next_slot(1.0)
        first = run(*patrol)
        assert first.code == 0, first.err
        # Traffic drifts: the reservoir's uniform sample of everything seen turns mostly shifted.
        _traffic(live.base_url, shifted)
        _next_slot(1.0)
        second = run(*patrol)
        assert second.code == 0, second.err
    listed = json.loads(run("checks", PROFILES, "--registry", registry, "--json").out)
    assert [entry["status"] for entry in listed] == ["ok", "alert"]
    assert [entry["checked"]["kind"] for entry in listed] == ["recent traffic", "recent traffic"]
    assert listed[1]["report"]["mean_shift"] > listed[0]["report"]["mean_shift"]
    text = run("checks", PROFILES, "--registry", registry).out
    assert "alert" in text.splitlines()[-1]
    future = run("checks", PROFILES, "--registry", registry, "--since", "2099-01-01")
    assert future.out.startswith(f"no recorded checks of {PROFILES} since 2099-01-01")


def _check_files(registry: Path) -> list[str]:
    """The complete check records of every version (a writer's temporary files start with a dot)."""
    folders = [
        registry / PROFILES / "records" / summary.id / CHECKS for summary in Registry(registry).versions(PROFILES)
    ]
    return [
        path.name for folder in folders if folder.is_dir() for path in folder.glob("*") if not path.name.startswith(".")
    ]


def test_killed_patrols_leave_no_partial_record_and_the_next_run_completes_the_slot(
    service_registry: ServiceRegistry, tmp_path: Path
) -> None:
    registry = tmp_path / "registry"
    shutil.copytree(service_registry.path, registry)
    sample = tmp_path / "sample.npy"
    np.save(sample, load_harbourline_profiles().embedding[:200])
    with live_server(registry, names=[PROFILES], log=tmp_path / "server.log") as live:
        command = [
            sys.executable, "-m", "veil.cli", "patrol", PROFILES, "--service", live.base_url, "--registry",
            str(registry), "--sample", str(sample), "--every", "0.2", "--rounds", "1000",
        ]  # fmt: skip
        rng = random.Random(0)
        for _ in range(6):
            before = len(_check_files(registry))
            process = subprocess.Popen(command, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
            # Killed at a random moment once it has recorded a round, not after a fixed delay: on a loaded
            # machine the interpreter's start-up alone can outlast any fixed delay, and the kill would prove nothing.
            deadline = time.monotonic() + 120
            while len(_check_files(registry)) == before and time.monotonic() < deadline:
                time.sleep(0.05)
            time.sleep(rng.uniform(0.0, 0.6))
            os.kill(process.pid, signal.SIGKILL)
            process.wait()
        final = run("patrol", PROFILES, "--service", live.base_url, "--registry", registry, "--sample", sample,
                    "--once", "--every", "0.2")  # fmt: skip
        assert final.code == 0, final.err
    complete = _check_files(registry)
    history = check_history(Registry(registry), PROFILES)  # every record reads and matches its sha256
    assert len(history) == len(complete) >= 6
    assert len({record.key for record in history}) == len(history)  # one record per slot
    assert run("verify", "--registry", registry).code == 0


@pytest.mark.parametrize(
    ("files", "argv", "message"),
    [
        ({}, ("--sample", "missing.npy"), "missing.npy does not exist"),
        ({"s.csv": b"1,2\n"}, ("--sample", "s.csv"), "a --sample is a .npy or .npz file, not .csv"),
        ({"s.npz": None}, ("--sample", "s.npz", "--attribute", "gender"), "has no array 'gender'"),
        ({"s.npy": None}, ("--sample", "s.npy", "--attribute", "pronoun"), "come with a .npz sample"),
        ({}, ("--attribute", "pronoun"), "give the sample too"),
        (
            {"s.npz": None},
            ("--sample", "s.npz", "--attribute", "pronoun", "--continuous", "age"),
            "names no --attribute",
        ),
        ({"s.npz": None}, ("--sample", "s.npz", "--attribute", "pronoun", "--continuous", "pronoun"), "not numbers"),
        ({}, ("--every", "0", "--once"), "--every must be a positive number of seconds"),
    ],
)
def test_what_the_patrol_cannot_use_is_refused_before_any_round(
    registry: Registry, tmp_path: Path, files: dict[str, bytes | None], argv: tuple[str, ...], message: str
) -> None:
    vectors = np.zeros((30, 384), dtype=np.float32)
    for name, content in files.items():
        if name.endswith(".npz"):
            np.savez(tmp_path / name, embedding=vectors, pronoun=np.array(["he"] * 30))
        elif name.endswith(".npy"):
            np.save(tmp_path / name, vectors)
        else:
            (tmp_path / name).write_bytes(content or b"")
    argv = tuple(str(tmp_path / a) if a in files or a == "missing.npy" else a for a in argv)
    # Nothing listens on port 9: a round would fail; every refusal here comes first, as one line, exit 2.
    result = run("patrol", PROFILES, "--service", "http://127.0.0.1:9", "--registry", registry.url, *argv)
    assert result.code == 2, result.err
    assert message in result.err
    assert len(result.err.strip().splitlines()) == 1
    assert check_history(registry, PROFILES) == []


def test_a_service_that_does_not_answer_fails_the_single_round_in_one_line(registry: Registry) -> None:
    result = run("patrol", PROFILES, "--service", "http://127.0.0.1:9", "--registry", registry.url, "--once")
    assert result.code == 1
    assert result.err.startswith("veil patrol: the service at http://127.0.0.1:9 did not answer: ")
    assert len(result.err.strip().splitlines()) == 1
    assert check_history(registry, PROFILES) == []


def test_a_labelled_sample_posts_each_attributes_labels(
    monkeypatch: pytest.MonkeyPatch, registry: Registry, service_registry: ServiceRegistry, tmp_path: Path
) -> None:
    sent: list[Any] = []

    def fake_drift(client: Any, name: str, vectors: Any = None, labels: Any = None, **kwargs: Any) -> dict[str, Any]:
        sent.append(labels)
        return _report(service_registry.leace)

    monkeypatch.setattr(VeilClient, "drift", fake_drift)
    sample = tmp_path / "s.npz"
    pronoun, age = np.array(["he", "she"] * 15), np.linspace(20, 70, 30)
    np.savez(sample, embedding=np.zeros((30, 384), dtype=np.float32), pronoun=pronoun, age=age)
    common = ("patrol", PROFILES, "--service", "http://veil", "--registry", registry.url, "--sample", sample, "--once")
    assert run(*common, "--attribute", "pronoun").code == 0
    # The same file, slot and length with other labels is another check, recorded beside the first.
    assert run(*common, "--attribute", "pronoun", "--attribute", "age", "--continuous", "age").code == 0
    # One attribute's class names as a list (what a version of one attribute takes); several by name, with
    # numbers for the continuous one.
    assert sent[0] == pronoun.tolist()
    assert sent[1] == {"pronoun": pronoun.tolist(), "age": age.tolist()}
    assert len(check_history(registry, PROFILES)) == 2


def test_a_sample_with_a_context_posts_it_and_is_another_check(
    monkeypatch: pytest.MonkeyPatch, registry: Registry, service_registry: ServiceRegistry, tmp_path: Path
) -> None:
    sent: list[Any] = []

    def fake_drift(client: Any, name: str, vectors: Any = None, labels: Any = None, **kwargs: Any) -> dict[str, Any]:
        sent.append(kwargs.get("context"))
        return _report(service_registry.leace)

    monkeypatch.setattr(VeilClient, "drift", fake_drift)
    sample = tmp_path / "s.npz"
    field = np.array(["care", "trades", "care"] * 10)
    np.savez(sample, embedding=np.zeros((30, 384), dtype=np.float32), pronoun=np.array(["he", "she"] * 15), field=field)
    common = ("patrol", PROFILES, "--service", "http://veil", "--registry", registry.url, "--sample", sample, "--once")
    assert run(*common, "--attribute", "pronoun").code == 0
    assert run(*common, "--attribute", "pronoun", "--given", "field").code == 0
    assert sent == [None, field.tolist()]
    # The same file and labels with a context is another check, recorded beside the first.
    assert len(check_history(registry, PROFILES)) == 2
    refused = run(*common, "--attribute", "pronoun", "--given", "region")
    assert refused.code == 2
    assert "has no array 'region'" in refused.err
    unlabelled = run(*common, "--given", "field")
    assert unlabelled.code == 2
    assert "--given needs the attribute's labels" in unlabelled.err
