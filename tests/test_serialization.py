"""Encoded artifacts round-trip exactly and refuse damage."""

from __future__ import annotations

import hashlib
import io
import json

import numpy as np
import pytest

from veil import INLP, LEACE, MeanProjection
from veil.registry.artifact_files import (
    ARRAYS_FILE,
    DESCRIPTION_FILE,
    ArtifactFormatError,
    content_digest,
    decode_artifact,
    encode_artifact,
)

from .conftest import planted


@pytest.mark.parametrize(
    "eraser",
    [LEACE(normalize=True), MeanProjection(), INLP(classifier="moments", max_iter=4, random_state=0)],
)
def test_round_trip_serves_identical_vectors(eraser) -> None:  # type: ignore[no-untyped-def]
    x, z = planted(n=600, d=7, seed=1)
    labels = np.array(["north", "south"])[z]
    artifact = eraser.fit(x, labels).export()
    loaded = decode_artifact(encode_artifact(artifact))
    np.testing.assert_array_equal(loaded.apply(x), artifact.apply(x))
    np.testing.assert_array_equal(loaded.class_means, artifact.class_means)
    assert list(loaded.classes) == ["north", "south"]
    assert loaded.history == artifact.history
    assert content_digest(loaded) == content_digest(artifact)


def test_the_same_eraser_encodes_to_the_same_bytes() -> None:
    x, z = planted(n=300, d=5, seed=2)
    artifact = LEACE().fit(x, z).export()
    assert encode_artifact(artifact) == encode_artifact(artifact)
    other = LEACE().fit(x[:200], z[:200]).export()
    assert content_digest(other) != content_digest(artifact)


@pytest.fixture
def encoded() -> dict[str, bytes]:
    """A LEACE artifact's files."""
    x, z = planted(n=300, d=5, seed=3)
    return encode_artifact(LEACE().fit(x, z).export())


def test_a_flipped_byte_in_the_arrays_is_refused(encoded: dict[str, bytes]) -> None:
    data = bytearray(encoded[ARRAYS_FILE])
    data[len(data) // 2] ^= 0x01
    encoded[ARRAYS_FILE] = bytes(data)
    with pytest.raises(ArtifactFormatError, match="does not match its sha256"):
        decode_artifact(encoded)


def test_a_changed_description_is_refused(encoded: dict[str, bytes]) -> None:
    description = json.loads(encoded[DESCRIPTION_FILE])
    description["normalize"] = True
    encoded[DESCRIPTION_FILE] = json.dumps(description).encode()
    with pytest.raises(ArtifactFormatError, match="content digest does not match"):
        decode_artifact(encoded)


def test_pickled_object_arrays_are_never_loaded(encoded: dict[str, bytes]) -> None:
    with np.load(io.BytesIO(encoded[ARRAYS_FILE])) as stored:
        arrays = {name: stored[name] for name in stored.files}
    arrays["labels"] = np.array([object(), object()], dtype=object)
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    encoded[ARRAYS_FILE] = buffer.getvalue()
    # Make the checksum agree, as a forger would, so only the pickle guard stands in the way.
    description = json.loads(encoded[DESCRIPTION_FILE])
    description["arrays_sha256"] = hashlib.sha256(encoded[ARRAYS_FILE]).hexdigest()
    encoded[DESCRIPTION_FILE] = json.dumps(description).encode()
    with pytest.raises(ArtifactFormatError, match="unreadable artifact"):
        decode_artifact(encoded)


def test_missing_and_garbled_files_are_refused(encoded: dict[str, bytes]) -> None:
    with pytest.raises(ArtifactFormatError, match=r"arrays\.npz is missing"):
        decode_artifact({DESCRIPTION_FILE: encoded[DESCRIPTION_FILE]})
    with pytest.raises(ArtifactFormatError, match="not valid JSON"):
        decode_artifact({**encoded, DESCRIPTION_FILE: b"{\xff"})
    with pytest.raises(ArtifactFormatError, match="not a veil artifact"):
        decode_artifact({**encoded, DESCRIPTION_FILE: b"[]"})


def test_the_artifact_names_the_kind_of_map_it_holds(encoded: dict[str, bytes]) -> None:
    description = json.loads(encoded[DESCRIPTION_FILE])
    assert description["map_kind"] == "affine-lowrank"
    assert description["format_version"] == 3
    assert description["pinned_coordinates"] == decode_artifact(encoded).pins.coordinates.tolist()
    assert decode_artifact(encoded).kind == "affine-lowrank"


def test_a_map_kind_this_release_does_not_know_is_refused_by_name(encoded: dict[str, bytes]) -> None:
    # As a newer release would write it, checksums and digest included: only the kind is unknown here.
    description = json.loads(encoded[DESCRIPTION_FILE])
    description["map_kind"] = "kind-of-a-later-release"
    with np.load(io.BytesIO(encoded[ARRAYS_FILE])) as stored:
        arrays = {name: stored[name] for name in stored.files}
    digest = hashlib.sha256(
        json.dumps({k: v for k, v in description.items() if k not in ("arrays_sha256", "content_digest")},
                   sort_keys=True).encode()
    )  # fmt: skip
    for name, array in sorted(arrays.items()):
        digest.update(f"{name}|{array.dtype.str}|{array.shape}".encode())
        digest.update(np.ascontiguousarray(array).tobytes())
    description["content_digest"] = digest.hexdigest()
    encoded[DESCRIPTION_FILE] = json.dumps(description).encode()
    with pytest.raises(ArtifactFormatError, match="unknown map kind 'kind-of-a-later-release'"):
        decode_artifact(encoded)
