"""The registry on a local directory and on fsspec's memory filesystem: versions, aliases, history, integrity."""

from __future__ import annotations

import hashlib
import io
import json
import threading
import uuid
from collections.abc import Iterator
from functools import partial
from pathlib import Path

import numpy as np
import pytest

from veil import LEACE
from veil.registry import (
    CARD_FILE,
    SEAL_FILE,
    IntegrityError,
    InvalidReferenceError,
    NotFoundError,
    PromotionError,
    Registry,
    RegistryError,
    RegistryLocationError,
)
from veil.registry.artifact_files import ARRAYS_FILE, DESCRIPTION_FILE, encode_artifact
from veil.registry.storage import FsspecStorage, LocalStorage

from .conftest import planted

NAME = "profiles-test"


def version_files(seed: int, d: int = 6) -> dict[str, bytes]:
    """A small real eraser's files and a minimal card."""
    x, z = planted(n=300, d=d, seed=seed)
    files = encode_artifact(LEACE().fit(x, z).export())
    files[CARD_FILE] = json.dumps(
        {"dim": d, "rank": 1, "method": "leace", "created_at": "t", "created_by": "u"}
    ).encode()
    return files


@pytest.fixture(params=["local", "memory"])
def registry(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[Registry]:
    if request.param == "local":
        yield Registry(tmp_path / "registry")
    else:
        url = f"memory://veil-tests/{uuid.uuid4().hex}"
        yield Registry(url)
        storage = FsspecStorage(url)
        if storage.fs.exists(storage._root):
            storage.fs.rm(storage._root, recursive=True)


def corrupt(registry: Registry, version_id: str, file_name: str) -> None:
    """Flip one byte in the middle of a stored file, behind the registry's back."""
    path = f"{NAME}/versions/{version_id}/{file_name}"
    data = bytearray(registry.storage.read(path))
    data[len(data) // 2] ^= 0x01
    registry.storage.replace(path, bytes(data))


def remove(registry: Registry, path: str) -> None:
    storage = registry.storage
    if isinstance(storage, LocalStorage):
        (storage.root / path).unlink()
    else:
        assert isinstance(storage, FsspecStorage)
        storage.fs.rm_file(f"{storage._root}/{path}")


def test_versions_get_sequence_numbers_and_content_hashes(registry: Registry) -> None:
    files = version_files(1)
    first = registry.add_version(NAME, files)
    second = registry.add_version(NAME, version_files(2))
    assert first.startswith("v0001-")
    assert second.startswith("v0002-")
    # The hash is sha256 over the file checksums (hashlib as the reference), so it names the content.
    checksums = {
        name: {"sha256": hashlib.sha256(data).hexdigest(), "bytes": len(data)} for name, data in sorted(files.items())
    }
    assert first.split("-")[1] == hashlib.sha256(json.dumps(checksums, sort_keys=True).encode()).hexdigest()[:12]
    assert [v.id for v in registry.versions(NAME)] == [first, second]
    assert registry.names() == [NAME]
    assert registry.resolve(NAME, "2") == registry.resolve(NAME, "v2") == second
    stored = registry.read_version(NAME, first)
    assert stored.files[ARRAYS_FILE] == files[ARRAYS_FILE]
    assert all(r.ok for r in registry.verify())


def test_promote_rollback_and_history(registry: Registry) -> None:
    v1, v2, v3 = (registry.add_version(NAME, version_files(seed)) for seed in (1, 2, 3))
    registry.promote(NAME, v1, reason="first")
    registry.promote(NAME, v2)
    registry.promote(NAME, v3, alias="canary")
    registry.promote(NAME, v3)
    assert registry.resolve(NAME, "live") == v3
    assert registry.rollback(NAME).to_version == v2
    assert registry.rollback(NAME).to_version == v1
    with pytest.raises(PromotionError, match="no earlier version"):
        registry.rollback(NAME)
    assert registry.resolve(NAME, "canary") == v3
    history = registry.history(NAME)
    assert [(e.action, e.alias, e.from_version, e.to_version) for e in history] == [
        ("promote", "live", None, v1),
        ("promote", "live", v1, v2),
        ("promote", "canary", None, v3),
        ("promote", "live", v2, v3),
        ("rollback", "live", v3, v2),
        ("rollback", "live", v2, v1),
    ]
    assert history[0].reason == "first"
    assert all(e.applied for e in history)
    assert [e.event for e in history] == list(range(1, 7))


def test_a_version_of_another_dimension_needs_the_flag(registry: Registry) -> None:
    narrow = registry.add_version(NAME, version_files(1, d=6))
    wide = registry.add_version(NAME, version_files(2, d=8))
    registry.promote(NAME, narrow)
    with pytest.raises(PromotionError, match="dimension 8 but alias 'live' serves dimension 6"):
        registry.promote(NAME, wide)
    assert registry.resolve(NAME, "live") == narrow
    registry.promote(NAME, wide, allow_dimension_change=True)
    assert registry.alias(NAME, "live").dim == 8  # type: ignore[union-attr]


def test_a_flipped_byte_is_found_refused_and_never_promoted(registry: Registry) -> None:
    good = registry.add_version(NAME, version_files(1))
    bad = registry.add_version(NAME, version_files(2))
    registry.promote(NAME, good)
    corrupt(registry, bad, ARRAYS_FILE)
    with pytest.raises(IntegrityError, match="does not match its sha256"):
        registry.read_version(NAME, bad)
    with pytest.raises(IntegrityError):
        registry.promote(NAME, bad)
    assert registry.resolve(NAME, "live") == good
    failures = [r for r in registry.verify(NAME) if not r.ok]
    assert [r.version for r in failures] == [bad]


@pytest.mark.parametrize("damage", ["delete a file", "truncate the card", "forge the seal"])
def test_every_kind_of_damage_is_refused(registry: Registry, damage: str) -> None:
    version_id = registry.add_version(NAME, version_files(1))
    base = f"{NAME}/versions/{version_id}"
    if damage == "delete a file":
        remove(registry, f"{base}/{DESCRIPTION_FILE}")
        expected = "artifact.json is missing"
    elif damage == "truncate the card":
        registry.storage.replace(f"{base}/{CARD_FILE}", registry.storage.read(f"{base}/{CARD_FILE}")[:10])
        expected = "card.json does not match"
    else:
        # A forger who rewrites a file and its checksum still cannot keep the id.
        files = version_files(2)
        seal = json.loads(registry.storage.read(f"{base}/{SEAL_FILE}"))
        registry.storage.replace(f"{base}/{ARRAYS_FILE}", files[ARRAYS_FILE])
        seal["files"][ARRAYS_FILE]["sha256"] = hashlib.sha256(files[ARRAYS_FILE]).hexdigest()
        registry.storage.replace(f"{base}/{SEAL_FILE}", json.dumps(seal).encode())
        expected = "do not match the version id"
    with pytest.raises(IntegrityError, match=expected):
        registry.read_version(NAME, version_id)
    with pytest.raises(IntegrityError):
        registry.promote(NAME, version_id)


def test_a_version_without_its_seal_is_invisible(registry: Registry) -> None:
    # What a writer killed mid-publish on an object store leaves behind.
    for name, data in version_files(1).items():
        registry.storage.replace(f"{NAME}/versions/v0001-0123456789ab/{name}", data)
    with pytest.raises(NotFoundError):
        registry.versions(NAME)
    assert registry.add_version(NAME, version_files(2)).startswith("v0001-")


def test_a_move_interrupted_after_its_history_event_is_finished_by_the_next_writer(registry: Registry) -> None:
    v1, v2, v3 = (registry.add_version(NAME, version_files(seed)) for seed in (1, 2, 3))
    registry.promote(NAME, v1)
    # The writer recorded event 2 and died before moving the alias.
    event = {
        "event": 2,
        "time": "t",
        "user": "u",
        "alias": "live",
        "action": "promote",
        "from_version": v1,
        "to_version": v2,
        "reason": "",
    }
    assert registry.storage.create_once(f"{NAME}/history/00000002.json", json.dumps(event).encode())
    assert registry.resolve(NAME, "live") == v1
    assert [e.applied for e in registry.history(NAME)] == [True, False]
    registry.promote(NAME, v3)
    assert [(e.event, e.to_version, e.from_version, e.applied) for e in registry.history(NAME)] == [
        (1, v1, None, True),
        (2, v2, v1, True),
        (3, v3, v2, True),
    ]


@pytest.mark.parametrize("bad", ["../x", "x/../../y", "Upper", "", "-lead", "a" * 65, "a b", "x.json"])
def test_names_that_could_escape_or_collide_are_refused(registry: Registry, bad: str) -> None:
    with pytest.raises(InvalidReferenceError):
        registry.add_version(bad, version_files(1))
    registry.add_version(NAME, version_files(1))
    with pytest.raises((InvalidReferenceError, NotFoundError)):
        registry.read_version(NAME, bad)
    with pytest.raises(InvalidReferenceError):
        registry.promote(NAME, "1", alias=bad)


def test_unknown_names_versions_and_aliases_are_not_found(registry: Registry) -> None:
    registry.add_version(NAME, version_files(1))
    with pytest.raises(NotFoundError, match="no eraser named 'other'"):
        registry.versions("other")
    with pytest.raises(NotFoundError, match="sequence number 7"):
        registry.resolve(NAME, "7")
    with pytest.raises(NotFoundError, match="no version v0001-ffffffffffff"):
        registry.resolve(NAME, "v0001-ffffffffffff")
    with pytest.raises(NotFoundError, match="alias called 'canary'"):
        registry.resolve(NAME, "canary")
    with pytest.raises(PromotionError, match="no alias 'live'"):
        registry.rollback(NAME)


def test_an_unservable_version_is_never_stored(registry: Registry) -> None:
    files = version_files(1)
    files[ARRAYS_FILE] = files[ARRAYS_FILE][:-5]
    with pytest.raises(IntegrityError):
        registry.add_version(NAME, files)
    with pytest.raises(NotFoundError):
        registry.versions(NAME)


def test_concurrent_promotes_are_serialised(registry: Registry) -> None:
    ids = [registry.add_version(NAME, version_files(seed)) for seed in range(1, 5)]
    barrier = threading.Barrier(len(ids))
    errors: list[BaseException] = []

    def promote(version_id: str) -> None:
        # Each thread opens its own lock; on a local directory each holds its own file description.
        own = Registry(registry.url, storage=registry.storage)
        barrier.wait()
        try:
            own.promote(NAME, version_id)
        except BaseException as error:  # a test collects every failure
            errors.append(error)

    threads = [threading.Thread(target=promote, args=(v,)) for v in ids]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert errors == []
    history = registry.history(NAME)
    assert [e.event for e in history] == [1, 2, 3, 4]
    # Each move starts where the previous one ended: none was lost to a race.
    assert [e.from_version for e in history[1:]] == [e.to_version for e in history[:-1]]
    assert registry.resolve(NAME, "live") == history[-1].to_version
    assert sorted(e.to_version for e in history) == sorted(ids)


def test_local_lock_is_an_flock_that_excludes_a_second_holder(tmp_path: Path) -> None:
    storage = LocalStorage(tmp_path)
    with storage.lock("x/lock", timeout=1.0), pytest.raises(TimeoutError), storage.lock("x/lock", timeout=0.1):
        pass
    with storage.lock("x/lock", timeout=0.1):
        pass


def test_memory_lease_is_exclusive_and_lapses(tmp_path: Path) -> None:
    storage = FsspecStorage(f"memory://veil-tests/{uuid.uuid4().hex}", lease_seconds=0.2)
    with storage.lock("x/lock", timeout=1.0):
        with pytest.raises(TimeoutError), storage.lock("x/lock", timeout=0.05):
            pass
        # A holder that died leaves its lease; it lapses and a new writer takes it.
        dead = FsspecStorage(storage.url, lease_seconds=0.2)
        assert dead.exists("x/lock")
    assert not storage.exists("x/lock")
    storage.replace("x/lock", json.dumps({"owner": "dead", "expires": 0}).encode())
    with storage.lock("x/lock", timeout=1.0):
        assert json.loads(storage.read("x/lock"))["owner"] != "dead"


def test_stored_arrays_load_without_pickle(registry: Registry) -> None:
    version_id = registry.add_version(NAME, version_files(1))
    data = registry.storage.read(f"{NAME}/versions/{version_id}/{ARRAYS_FILE}")
    with np.load(io.BytesIO(data), allow_pickle=False) as stored:
        assert all(stored[name].dtype != object for name in stored.files)


def test_a_registry_path_that_is_a_file_is_named_not_reported_as_errno_20(tmp_path: Path) -> None:
    (tmp_path / "file").write_text("")
    files = version_files(0)
    for registry in (Registry(tmp_path / "file"), Registry(tmp_path / "file" / "below")):
        for attempt in (registry.names, partial(registry.versions, NAME), partial(registry.add_version, NAME, files)):
            with pytest.raises(RegistryLocationError, match=f"{tmp_path / 'file'} is a file") as caught:
                attempt()
            # Still an OSError and a RegistryError: callers that catch either (the service) keep catching it.
            assert isinstance(caught.value, OSError)
            assert isinstance(caught.value, RegistryError)
            assert "Errno" not in str(caught.value)
    assert (tmp_path / "file").read_text() == ""
