"""Saved artifacts round-trip exactly and refuse damage."""

from __future__ import annotations

import json
import zipfile
from pathlib import Path

import numpy as np
import pytest

from veil import INLPEraser, LeaceEraser, MeanProjectionEraser
from veil.serialization import (
    ARRAYS_FILE,
    DESCRIPTION_FILE,
    ArtifactFormatError,
    content_digest,
    file_sha256,
    read_artifact,
    write_artifact,
)

from .conftest import planted


@pytest.mark.parametrize(
    "eraser",
    [LeaceEraser(normalize=True), MeanProjectionEraser(), INLPEraser(classifier="moments", max_iter=4, random_state=0)],
)
def test_round_trip_serves_identical_vectors(eraser, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    x, z = planted(n=600, d=7, seed=1)
    labels = np.array(["north", "south"])[z]
    artifact = eraser.fit(x, labels).export()
    digest = write_artifact(artifact, tmp_path / "v1")
    loaded = read_artifact(tmp_path / "v1")
    np.testing.assert_array_equal(loaded.apply(x), artifact.apply(x))
    np.testing.assert_array_equal(loaded.class_means, artifact.class_means)
    assert list(loaded.classes) == ["north", "south"]
    assert loaded.history == artifact.history
    assert content_digest(loaded) == digest


def test_the_same_eraser_has_the_same_digest_whenever_it_is_written(tmp_path: Path) -> None:
    x, z = planted(n=300, d=5, seed=2)
    artifact = LeaceEraser().fit(x, z).export()
    assert write_artifact(artifact, tmp_path / "a") == write_artifact(artifact, tmp_path / "b")
    other = LeaceEraser().fit(x[:200], z[:200]).export()
    assert content_digest(other) != content_digest(artifact)


@pytest.fixture
def saved(tmp_path: Path) -> Path:
    """A LEACE artifact written to a fresh directory."""
    x, z = planted(n=300, d=5, seed=3)
    write_artifact(LeaceEraser().fit(x, z).export(), tmp_path / "v")
    return tmp_path / "v"


def test_a_flipped_byte_in_the_arrays_is_refused(saved: Path) -> None:
    path = saved / ARRAYS_FILE
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0x01
    path.write_bytes(bytes(data))
    with pytest.raises(ArtifactFormatError, match="does not match its sha256"):
        read_artifact(saved)


def test_a_changed_description_is_refused(saved: Path) -> None:
    path = saved / DESCRIPTION_FILE
    description = json.loads(path.read_text())
    description["normalize"] = True
    path.write_text(json.dumps(description))
    with pytest.raises(ArtifactFormatError, match="content digest does not match"):
        read_artifact(saved)


def test_pickled_object_arrays_are_never_loaded(saved: Path) -> None:
    arrays_path = saved / ARRAYS_FILE
    with np.load(arrays_path) as stored:
        arrays = {name: stored[name] for name in stored.files}
    arrays["labels"] = np.array([object(), object()], dtype=object)
    np.savez(arrays_path, **arrays)
    # Make the checksums agree, as a forger would, so only the pickle guard stands in the way.
    description_path = saved / DESCRIPTION_FILE
    description = json.loads(description_path.read_text())
    description["arrays_sha256"] = file_sha256(arrays_path)
    description_path.write_text(json.dumps(description))
    with pytest.raises(ArtifactFormatError, match="unreadable artifact"):
        read_artifact(saved)


def test_missing_files_and_non_empty_targets_are_refused(saved: Path, tmp_path: Path) -> None:
    with pytest.raises(ArtifactFormatError, match="is missing"):
        read_artifact(tmp_path / "nothing")
    x, z = planted(n=300, d=5, seed=6)
    with pytest.raises(FileExistsError, match="non-empty directory"):
        write_artifact(LeaceEraser().fit(x, z).export(), saved)
    assert zipfile.is_zipfile(saved / ARRAYS_FILE)
