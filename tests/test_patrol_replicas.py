"""Every replica in one check: replicas found, their samples merged by what each cleaned, checked once, recorded."""

from __future__ import annotations

import io
import json
import shutil
import socket
from concurrent.futures import ThreadPoolExecutor
from contextlib import ExitStack
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest

from reliability.server import LiveServer, free_port, live_server
from veil.patrol.replicas import ReplicaSample, ReplicaSet, merge_samples, resolve_replicas, shares
from veil.patrol.rounds import check_history, replicas_round
from veil.registry import Registry
from veil.samples.harbourline import load_harbourline_profiles
from veil_client import RecentTraffic, VeilClient, VeilClientError, VeilTransportError

from .service_fixtures import PROFILES, ServiceRegistry, app_for, client_for
from .test_cli import run
from .test_evidence_schema import _evidence, _validate

SLOT = 60.0
T0 = 1_800_000_000.0  # a slot boundary


@pytest.mark.parametrize(
    ("held", "seen", "limit", "expected"),
    [
        # The busiest replica binds: m = 1000 * 9000 / 6000 = 1500 rows, split 6:2:1 = 1000, 333.3, 166.7;
        # the one row left goes to the largest remainder (Hamilton's apportionment, a published rule).
        ([1000, 1000, 1000], [6000, 2000, 1000], None, [1000, 333, 167]),
        # Every reservoir holds all it saw: everything is taken.
        ([300, 150, 60], [300, 150, 60], None, [300, 150, 60]),
        # A replica with no traffic gives nothing and weighs nothing.
        ([500, 0], [800, 0], None, [500, 0]),
        # Within a limit, still 1:1:1 (remainders tie: the earlier replica first).
        ([100, 100, 100], [100, 100, 100], 100, [34, 33, 33]),
        # Repeats: 200 distinct vectors stand for 1000 cleaned; m = min(200 * 1200 / 1000, 200 * 1200 / 200).
        ([200, 200], [1000, 200], None, [200, 40]),
    ],
)
def test_each_replica_gives_rows_in_proportion_to_what_it_cleaned(
    held: list[int], seen: list[int], limit: int | None, expected: list[int]
) -> None:
    taken = shares(held, seen, limit)
    assert taken == expected
    assert all(t <= h for t, h in zip(taken, held, strict=True))


def _sample(address: str, vectors: np.ndarray, seen: int, version: str = "v0001-aaaaaaaaaaaa") -> ReplicaSample:
    traffic = RecentTraffic(vectors=vectors.astype(np.float32), traffic_seen=seen, version=version, eraser=PROFILES)
    return ReplicaSample(address, traffic)


def test_a_vector_two_replicas_hold_is_kept_once_and_the_order_follows_the_vectors() -> None:
    rows = np.random.default_rng(0).normal(size=(90, 8)).astype(np.float32)
    first, second = rows[:60], rows[40:]  # rows 40..59 reached both replicas
    merged = merge_samples([_sample("a", first, 60), _sample("b", second, 50)])
    # numpy's own unique rows (sorted, each once) is what the pooled traffic gives, however it was spread.
    np.testing.assert_array_equal(merged.vectors, np.unique(rows, axis=0))
    swapped = merge_samples([_sample("b", second[::-1], 50), _sample("a", first[::-1], 60)])
    np.testing.assert_array_equal(swapped.vectors, merged.vectors)
    assert merged.taken == {"a": 60, "b": 50}
    with pytest.raises(ValueError, match="samples of different versions are never merged"):
        merge_samples([_sample("a", first, 60), _sample("b", second, 50, version="v0002-bbbbbbbbbbbb")])


def test_a_busy_replica_is_resampled_down_to_its_share() -> None:
    rng = np.random.default_rng(1)
    busy, quiet = rng.normal(size=(100, 4)), rng.normal(size=(100, 4))
    # The busy replica cleaned 900 vectors, the quiet one 100: of the m = 100 * 1000 / 900 = 111 rows, 100 and 11.
    merged = merge_samples([_sample("busy", busy, 900), _sample("quiet", quiet, 100)])
    assert merged.taken == {"busy": 100, "quiet": 11}
    from_quiet = np.isin(merged.vectors.view(np.dtype((np.void, 16))), quiet.astype(np.float32).view((np.void, 16)))
    assert int(from_quiet.sum()) == 11


def _resolver(table: dict[str, list[str]]) -> Any:
    """A getaddrinfo over a fixed table, answering as the real one does (family, type, proto, name, sockaddr)."""

    def getaddrinfo(host: str, port: int, *args: Any, **kwargs: Any) -> list[tuple[Any, ...]]:
        if host not in table:
            raise socket.gaierror(socket.EAI_NONAME, "Name or service not known")
        return [
            (socket.AF_INET6 if ":" in ip else socket.AF_INET, socket.SOCK_STREAM, 6, "", (ip, port))
            for ip in table[host]
        ]

    return getaddrinfo


def test_a_headless_name_gives_every_address_it_resolves_to_at_each_call(monkeypatch: pytest.MonkeyPatch) -> None:
    table = {"veil-replicas": ["10.0.0.7", "10.0.0.5", "fd00::9", "10.0.0.5"]}
    monkeypatch.setattr(socket, "getaddrinfo", _resolver(table))
    replicas = ReplicaSet(services=("http://10.0.0.5:8080",), replicas_of=("http://veil-replicas:8080", "http://gone"))
    found, failed = replicas.addresses()
    # Each address once (the one given by hand too), IPv6 in brackets, the port kept.
    assert found == ["http://10.0.0.5:8080", "http://10.0.0.7:8080", "http://[fd00::9]:8080"]
    assert [entry.address for entry in failed] == ["http://gone"]
    assert "does not resolve" in failed[0].error
    # Resolved again at each call: a replica that went away is no longer asked.
    table["veil-replicas"] = ["10.0.0.7"]
    assert replicas.addresses()[0] == ["http://10.0.0.5:8080", "http://10.0.0.7:8080"]
    assert resolve_replicas("https://veil-replicas/base/") == ["https://10.0.0.7:443/base"]
    assert replicas.describe() == "http://10.0.0.5:8080 replicas-of http://veil-replicas:8080 replicas-of http://gone"


@pytest.fixture
def registry(service_registry: ServiceRegistry, tmp_path: Path) -> Registry:
    shutil.copytree(service_registry.path, tmp_path / "registry")
    return Registry(tmp_path / "registry")


def _fake_replicas(answers: dict[str, RecentTraffic | Exception]) -> Any:
    def fetch(address: str) -> RecentTraffic:
        answer = answers[address]
        if isinstance(answer, Exception):
            raise answer
        return answer

    return fetch


def test_replicas_of_two_versions_are_never_merged_and_each_record_names_the_others(
    registry: Registry, service_registry: ServiceRegistry
) -> None:
    old, new = service_registry.leace, service_registry.meanproj
    rows = np.random.default_rng(2).normal(size=(120, 384)).astype(np.float32)
    answers: dict[str, RecentTraffic | Exception] = {
        "http://r1": RecentTraffic(rows[:50], 50, old, PROFILES),
        "http://r2": RecentTraffic(rows[50:], 70, new, PROFILES),
        "http://r3": VeilTransportError("connection refused"),
    }
    posted: list[tuple[str, int, str]] = []

    def post(address: str, vectors: np.ndarray, version: str) -> dict[str, Any]:
        posted.append((address, vectors.shape[0], version))
        return {"version": version, "status": "ok", "reasons": [], "rows": vectors.shape[0]}

    replicas = ReplicaSet(services=("http://r1", "http://r2", "http://r3"))
    outcome = replicas_round(registry, PROFILES, replicas, _fake_replicas(answers), post, every=SLOT, now=T0 + 3)
    # One check per version, each on its own replicas' rows, checked by one of them, pinned to it.
    assert posted == [("http://r1", 50, old), ("http://r2", 70, new)]
    bodies = {record.version: record.body for record in (o.record for o in outcome.outcomes)}
    assert bodies[old]["replicas"]["other_versions"] == [new]
    assert bodies[new]["replicas"]["other_versions"] == [old]
    for body in bodies.values():
        assert [entry["address"] for entry in body["replicas"]["reached"]] == ["http://r1", "http://r2"]
        # The replica that did not answer is in every record, with why.
        assert body["replicas"]["unanswered"] == [{"address": "http://r3", "error": "connection refused"}]
    assert [entry["merged_rows"] for entry in bodies[old]["replicas"]["reached"]] == [50, 0]
    # A retried round in the same slot finds both records and posts nothing.
    again = replicas_round(registry, PROFILES, replicas, _fake_replicas(answers), post, every=SLOT, now=T0 + 30)
    assert all(o.already_stored for o in again.outcomes)
    assert len(posted) == 2
    assert len(check_history(registry, PROFILES)) == 2


def test_a_round_no_replica_answers_records_nothing_and_says_who(registry: Registry) -> None:
    answers: dict[str, RecentTraffic | Exception] = {
        "http://r1": VeilTransportError("connection refused"),
        "http://r2": VeilClientError(403, "forbidden", "the bearer token is not valid for this route"),
    }
    replicas = ReplicaSet(services=("http://r1", "http://r2"))

    def post(address: str, vectors: np.ndarray, version: str) -> dict[str, Any]:
        raise AssertionError("nothing to check")

    with pytest.raises(VeilTransportError, match="http://r1: connection refused; http://r2: 403 forbidden"):
        replicas_round(registry, PROFILES, replicas, _fake_replicas(answers), post, every=SLOT, now=T0)
    # Every replica refusing is a refusal, not an outage: the patrol stops on it.
    refused = {address: answers["http://r2"] for address in answers}
    with pytest.raises(VeilClientError, match="forbidden"):
        replicas_round(registry, PROFILES, replicas, _fake_replicas(refused), post, every=SLOT, now=T0)
    assert check_history(registry, PROFILES) == []


@pytest.mark.anyio
async def test_the_recent_route_hands_out_the_reservoir_with_what_it_stands_for(
    service_registry: ServiceRegistry,
) -> None:
    rows = load_harbourline_profiles().embedding[:40].astype(np.float32)
    url, token = f"/v1/erasers/{PROFILES}/recent", {"Authorization": "Bearer data-token"}
    admin = {"Authorization": "Bearer admin-token"}
    async with client_for(app_for(service_registry.path, data_token="data-token", admin_token=None)) as client:
        # Other callers' raw vectors: an admin route, off where no admin token is configured.
        assert (await client.get(url, headers=token)).json()["error"]["code"] == "admin_disabled"
    async with client_for(app_for(service_registry.path, data_token="data-token", admin_token="admin-token")) as client:
        assert (await client.get(url)).status_code == 401
        assert (await client.get(url, headers=token)).status_code == 403  # the data token is not enough
        empty = await client.get(url, headers=admin)
        assert (empty.json()["rows"], empty.headers["x-veil-traffic-seen"]) == (0, "0")
        for batch in (rows, rows[:10]):  # ten vectors sent twice
            sent = await client.post(f"/v1/erasers/{PROFILES}/apply", json={"vectors": batch.tolist()}, headers=token)
            assert sent.status_code == 200
        as_json = (await client.get(url, headers=admin)).json()
        as_npy = await client.get(url, headers={**admin, "Accept": "application/x-npy"})
    # Each distinct vector once; every vector cleaned counted, repeats included; the version served named.
    assert (as_json["rows"], as_json["traffic_seen"]) == (40, 50)
    assert as_json["version"] == as_npy.headers["x-veil-version"] == service_registry.leace
    held = np.load(io.BytesIO(as_npy.content), allow_pickle=False)
    np.testing.assert_array_equal(np.asarray(as_json["vectors"], dtype=np.float32), held)
    np.testing.assert_array_equal(np.unique(held, axis=0), np.unique(rows, axis=0))


def _traffic(base: str, vectors: np.ndarray) -> None:
    with httpx.Client(base_url=base, timeout=30.0) as client:
        for start in range(0, vectors.shape[0], 100):
            # JSON numbers written from float32 values read back as the same float32 values.
            response = client.post(
                f"/v1/erasers/{PROFILES}/apply", json={"vectors": vectors[start : start + 100].tolist()}
            )
            assert response.status_code == 200


ADMIN = {"VEIL_ADMIN_TOKEN": "patrol-admin-token"}


def _replicas(stack: ExitStack, registry: Path, logs: Path, count: int) -> list[LiveServer]:
    """``count`` real ``veil serve`` processes started side by side (a start is mostly imports), stopped by stack."""
    managers = [
        live_server(registry, names=[PROFILES], log=logs / f"replica{index}.log", environment=ADMIN)
        for index in range(count)
    ]
    with ThreadPoolExecutor(count) as pool:
        starts = [pool.submit(manager.__enter__) for manager in managers]
    servers = []
    for manager, start in zip(managers, starts, strict=True):
        if start.exception() is None:
            stack.push(manager.__exit__)
            servers.append(start.result())
    for start in starts:
        start.result()  # a replica that did not start fails the test, once every started one is in the stack
    return servers


def test_three_real_replicas_checked_as_one_equal_a_check_of_the_same_vectors_on_one(
    service_registry: ServiceRegistry, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("VEIL_ADMIN_TOKEN", ADMIN["VEIL_ADMIN_TOKEN"])  # what the patrol fetches the traffic with
    registry = tmp_path / "registry"
    shutil.copytree(service_registry.path, registry)
    rows = load_harbourline_profiles().embedding[:480].astype(np.float32)
    # Uneven traffic: 300, 150 and 60 vectors; 30 of the second replica's also reached the first.
    spread = [rows[:300], np.concatenate([rows[270:300], rows[300:420]]), rows[420:480]]
    dead = f"http://127.0.0.1:{free_port()}"  # nothing listens there
    with ExitStack() as stack:
        live = _replicas(stack, registry, tmp_path, 3)
        for replica, vectors in zip(live, spread, strict=True):
            _traffic(replica.base_url, vectors)
        services = [argument for replica in live for argument in ("--service", replica.base_url)]
        patrol = ("patrol", PROFILES, *services, "--service", dead, "--registry", registry, "--once", "--every", "3600")
        first = run(*patrol)
        assert first.code == 0, first.err
        again = run(*patrol)  # the same slot: found recorded, not checked again
        assert again.code == 0, again.err
        assert "already recorded" in again.out
        # The same vectors sent to one replica: the traffic of all three, each vector once, in ascending order
        # (numpy's unique rows).
        with VeilClient(live[0].base_url) as client:
            version = client.eraser(PROFILES)["version"]
            alone = client.drift(PROFILES, np.unique(rows, axis=0), version=version)
    (record,) = check_history(Registry(registry), PROFILES)
    body = record.body
    # The same check: the merged sample was checked by the code path and process a posted sample takes, so
    # every figure is the same number, not one within round-off.
    assert body["report"] == alone
    assert body["report"]["rows"] == 480
    assert body["checked"]["traffic_seen"] == 510
    reached = body["replicas"]["reached"]
    assert [entry["address"] for entry in reached] == [replica.base_url for replica in live]
    assert [entry["traffic_seen"] for entry in reached] == [300, 150, 60]
    assert [entry["merged_rows"] for entry in reached] == [300, 150, 60]
    (unanswered,) = body["replicas"]["unanswered"]
    assert unanswered["address"] == dead
    assert body["replicas"]["checked_by"] == live[0].base_url
    listed = run("checks", PROFILES, "--registry", registry)
    assert f"no answer from {dead}" in listed.out
    assert json.loads(run("checks", PROFILES, "--registry", registry, "--json").out)[0]["key"] == record.key
    # The version's evidence document, with the merged check in it, still validates against its schema.
    evidence = _evidence(registry, PROFILES, record.version)
    _validate(evidence)
    assert evidence["live_checks"][0]["replicas"]["unanswered"][0]["address"] == dead


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        ((), "give the service to check: --service URL (repeatable) or --replicas-of URL"),
        (
            ("--service", "http://a", "--service", "http://b", "--sample", "s.npy"),
            "a posted --sample is checked by one",
        ),
        (("--replicas-of", "http://veil-replicas:8080", "--sample", "s.npy"), "a posted --sample is checked by one"),
    ],
)
def test_what_a_patrol_of_replicas_cannot_do_is_refused_before_any_round(
    registry: Registry, tmp_path: Path, argv: tuple[str, ...], message: str
) -> None:
    np.save(tmp_path / "s.npy", np.zeros((30, 384), dtype=np.float32))
    argv = tuple(str(tmp_path / a) if a == "s.npy" else a for a in argv)
    result = run("patrol", PROFILES, "--registry", registry.url, "--once", *argv)
    assert result.code == 2, result.err
    assert message in result.err
    assert check_history(registry, PROFILES) == []
