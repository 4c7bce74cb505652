"""Write and read an :class:`EraserArtifact` as plain files: NumPy arrays and a JSON description.

A saved artifact is a directory with ``arrays.npz`` (read with
``allow_pickle=False``, so loading never runs code) and ``artifact.json``
(method, parameters, shapes, history and the sha256 of the arrays file).
:func:`content_digest` hashes the arrays and description themselves, not
the zip container, so the same eraser always has the same digest.
"""

from __future__ import annotations

import hashlib
import io
import json
import os
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil.artifact import EraserArtifact
from veil.lowrank import AffineLowRankMap
from veil.moments import MomentState

ARRAYS_FILE = "arrays.npz"
DESCRIPTION_FILE = "artifact.json"
FORMAT_VERSION = 1

_MOMENT_ARRAYS = ("mean_x", "mean_z", "comoment_xx", "comoment_xz", "comoment_zz")


class ArtifactFormatError(ValueError):
    """A saved artifact is missing, damaged or not an artifact veil can read."""


def _json_safe(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, dict):
        return {str(k): _json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_json_safe(v) for v in value]
    return value


def artifact_arrays(artifact: EraserArtifact) -> dict[str, NDArray[Any]]:
    """The artifact's arrays by name (the map, the moments, the class labels)."""
    moments = artifact.moments
    arrays: dict[str, NDArray[Any]] = {
        "mean": artifact.map.mean,
        "u": artifact.map.u,
        "v": artifact.map.v,
        "count": np.array(moments.count, dtype=np.int64),
    }
    arrays.update({name: getattr(moments, name) for name in _MOMENT_ARRAYS})
    if moments.labels is not None:
        arrays["labels"] = moments.labels
    return arrays


def artifact_description(artifact: EraserArtifact) -> dict[str, Any]:
    """The artifact's JSON-safe description (everything but the arrays)."""
    return {
        "format_version": FORMAT_VERSION,
        "method": artifact.method,
        "params": _json_safe(dict(artifact.params)),
        "normalize": artifact.normalize,
        "dim": artifact.map.dim,
        "rank": artifact.map.rank,
        "categorical": artifact.moments.labels is not None,
        "history": _json_safe(artifact.history),
    }


def content_digest(artifact: EraserArtifact) -> str:
    """sha256 over the description and every array's name, dtype, shape and bytes, in name order."""
    digest = hashlib.sha256(json.dumps(artifact_description(artifact), sort_keys=True).encode())
    for name, array in sorted(artifact_arrays(artifact).items()):
        contiguous = np.ascontiguousarray(array)
        digest.update(f"{name}|{contiguous.dtype.str}|{contiguous.shape}".encode())
        digest.update(contiguous.tobytes())
    return digest.hexdigest()


def file_sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with path.open("rb") as handle:
        for block in iter(lambda: handle.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _write_synced(path: Path, data: bytes) -> None:
    with path.open("wb") as handle:
        handle.write(data)
        handle.flush()
        os.fsync(handle.fileno())


def write_artifact(artifact: EraserArtifact, directory: Path) -> str:
    """Write the artifact into an empty or new ``directory``; returns its :func:`content_digest`.

    Files are written and fsynced in full; a caller that needs the whole
    directory to appear at once writes it under a temporary name and renames it.
    """
    directory.mkdir(parents=True, exist_ok=True)
    if any(directory.iterdir()):
        raise FileExistsError(f"refusing to write an artifact into the non-empty directory {directory}")
    buffer = io.BytesIO()
    # No object arrays are ever written, so no reader ever needs pickle.
    np.savez(buffer, allow_pickle=False, **artifact_arrays(artifact))
    arrays_bytes = buffer.getvalue()
    _write_synced(directory / ARRAYS_FILE, arrays_bytes)
    description = artifact_description(artifact)
    description["arrays_sha256"] = hashlib.sha256(arrays_bytes).hexdigest()
    description["content_digest"] = content_digest(artifact)
    _write_synced(directory / DESCRIPTION_FILE, json.dumps(description, indent=2, sort_keys=True).encode())
    return str(description["content_digest"])


def read_artifact(directory: Path) -> EraserArtifact:
    """Read and verify an artifact written by :func:`write_artifact`.

    Raises
    ------
    ArtifactFormatError
        A file is missing or unreadable, a checksum or the content digest
        does not match, or the arrays are inconsistent.
    """
    description_path, arrays_path = directory / DESCRIPTION_FILE, directory / ARRAYS_FILE
    for path in (description_path, arrays_path):
        if not path.is_file():
            raise ArtifactFormatError(f"{path} is missing")
    try:
        description = json.loads(description_path.read_text(encoding="utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as error:
        raise ArtifactFormatError(f"{description_path} is not valid JSON: {error}") from None
    if not isinstance(description, dict) or description.get("format_version") != FORMAT_VERSION:
        raise ArtifactFormatError(f"{description_path} is not a veil artifact of format {FORMAT_VERSION}")
    if file_sha256(arrays_path) != description.get("arrays_sha256"):
        raise ArtifactFormatError(f"{arrays_path} does not match its sha256: the file is damaged or was changed")
    try:
        with np.load(arrays_path, allow_pickle=False) as stored:
            arrays = {name: stored[name] for name in stored.files}
        artifact = EraserArtifact(
            method=str(description["method"]),
            params=dict(description["params"]),
            map=AffineLowRankMap(mean=arrays["mean"], u=arrays["u"], v=arrays["v"]),
            normalize=bool(description["normalize"]),
            moments=MomentState(
                count=int(arrays["count"]),
                labels=arrays.get("labels"),
                **{name: arrays[name] for name in _MOMENT_ARRAYS},
            ),
            history=list(description["history"]),
        )
    except (KeyError, ValueError, TypeError, OSError) as error:
        raise ArtifactFormatError(f"{directory} holds an unreadable artifact: {error}") from None
    if content_digest(artifact) != description.get("content_digest"):
        raise ArtifactFormatError(f"{directory}: the content digest does not match the stored one")
    return artifact
