"""Write and read an :class:`MapArtifact` as plain files: NumPy arrays and a JSON description.

An artifact is two files: ``arrays.npz`` (read with ``allow_pickle=False``,
so loading never runs code) and ``artifact.json`` (method, the kind of map,
parameters, shapes, history and the sha256 of the arrays file).

Format 3 adds the pinned coordinates (arrays ``pins.*`` and their list,
``pinned_coordinates``, in the description: see :mod:`veil.maps.pins`); a
release that cannot pin refuses it rather than serve rows without the pins.
Format 2 names the map's kind (``map_kind``) and stores the map's own arrays
under a ``map.`` prefix; format 1, written before map kinds existed, holds
an affine low-rank map as ``mean``, ``u`` and ``v``.  Both are still read,
without pins, and answer as they always did.  A
version guarded within contexts also stores the moments within each value,
one set per pair of a context column and an attribute (arrays
``given.K.*``, and ``"contexts"`` naming the columns and attributes in the
description); one written when a version had one context (arrays
``given.*``, ``"context": true``) or none still reads as it always did.
:func:`content_digest` hashes the arrays and description themselves, not
the zip container, so the same eraser always has the same digest.
"""

from __future__ import annotations

import hashlib
import io
import json
import zipfile
from collections.abc import Mapping
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil.maps.artifact import MapArtifact
from veil.maps.attribute import AttributeBlock
from veil.maps.context import ContextMoments
from veil.maps.given import GivenMoments
from veil.maps.kinds import EmbeddingMap, map_from_arrays
from veil.maps.lowrank import AffineLowRankMap
from veil.maps.moments import MomentState
from veil.maps.pins import CoordinatePins

ARRAYS_FILE = "arrays.npz"
DESCRIPTION_FILE = "artifact.json"
FORMAT_VERSION = 3
READABLE_FORMATS = (1, 2, 3)
_MAP_PREFIX = "map."
_PINS_PREFIX = "pins."
# The classes of the categorical attributes of an artifact of several, by position.
_BLOCK_LABELS = "attribute_labels."
# Each attribute's own moments, by position, when the labels were incomplete.
_PARTIAL = "partial."

_MOMENT_ARRAYS = ("mean_x", "mean_z", "comoment_xx", "comoment_xz", "comoment_zz")
# The moments within each value of a context (see veil.maps.context.ContextMoments), by field: of the one
# pair of a version written with one context, or of pair K (given.K.*) of one written with several.
_CONTEXT = "given."
_CONTEXT_ARRAYS = ("values", "labels", "class_counts", "mean_x", "comoment_xz")
# The column and attribute a version of one context read back with: its artifact named neither.
_LEGACY_PAIR = ("",)


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


def artifact_arrays(artifact: MapArtifact) -> dict[str, NDArray[Any]]:
    """The artifact's arrays by name (the map, the moments, the class labels)."""
    moments = artifact.moments
    arrays: dict[str, NDArray[Any]] = {_MAP_PREFIX + name: array for name, array in artifact.map.arrays().items()}
    arrays["count"] = np.array(moments.count, dtype=np.int64)
    arrays.update({name: getattr(moments, name) for name in _MOMENT_ARRAYS})
    if moments.labels is not None:
        arrays["labels"] = moments.labels
    for position, block in enumerate(moments.blocks):
        if block.labels is not None:
            arrays[f"{_BLOCK_LABELS}{position}"] = block.labels
    for position, state in enumerate(moments.partial):
        arrays[f"{_PARTIAL}{position}.count"] = np.array(state.count, dtype=np.int64)
        arrays.update({f"{_PARTIAL}{position}.{name}": getattr(state, name) for name in _MOMENT_ARRAYS})
    if moments.given is not None:
        arrays.update(_context_arrays(moments.given))
    if artifact.pins is not None:
        arrays.update({_PINS_PREFIX + name: array for name, array in artifact.pins.arrays().items()})
    return arrays


def _is_legacy(given: GivenMoments) -> bool:
    """Whether ``given`` was read from a version of one context, and is written back as it was."""
    return given.columns == _LEGACY_PAIR and given.attributes == _LEGACY_PAIR and not given.moments[0].pooled.size


def _context_arrays(given: GivenMoments) -> dict[str, NDArray[Any]]:
    if _is_legacy(given):
        return {_CONTEXT + name: getattr(given.moments[0], name) for name in _CONTEXT_ARRAYS}
    arrays = {}
    for position, moments in enumerate(given.moments):
        prefix = f"{_CONTEXT}{position}."
        arrays.update({prefix + name: getattr(moments, name) for name in _CONTEXT_ARRAYS})
        if moments.pooled.size:
            arrays[prefix + "pooled"] = moments.pooled
    return arrays


def _context_description(given: GivenMoments | None) -> dict[str, Any]:
    # Only where there is one: the descriptions (and digests) of other versions stay as they were.
    if given is None:
        return {}
    if _is_legacy(given):
        return {"context": True}
    return {"contexts": {"columns": list(given.columns), "attributes": list(given.attributes)}}


def _blocks_description(moments: MomentState) -> dict[str, Any]:
    """Several attributes' names, kinds and columns (nothing for one attribute, as artifacts always were)."""
    if not moments.blocks:
        return {}
    return {
        "attributes": [
            {"name": block.name, "kind": block.kind, "columns": [block.start, block.stop]} for block in moments.blocks
        ],
        # Incomplete labels: each attribute's moments come from the rows that carry it (arrays ``partial.N.*``).
        **({"incomplete": True} if moments.partial else {}),
    }


def _stored_partial(description: Mapping[str, Any], arrays: Mapping[str, NDArray[Any]]) -> tuple[MomentState, ...]:
    if not description.get("incomplete"):
        return ()
    states = []
    for position, block in enumerate(_stored_blocks(description, arrays)):
        prefix = f"{_PARTIAL}{position}."
        states.append(
            MomentState(
                count=int(arrays[prefix + "count"]),
                mean_x=arrays[prefix + "mean_x"],
                mean_z=arrays[prefix + "mean_z"],
                comoment_xx=arrays[prefix + "comoment_xx"],
                comoment_xz=arrays[prefix + "comoment_xz"],
                comoment_zz=arrays[prefix + "comoment_zz"],
                labels=block.labels,
            )
        )
    return tuple(states)


def _stored_context(description: Mapping[str, Any], arrays: Mapping[str, NDArray[Any]]) -> GivenMoments | None:
    if description.get("context"):
        legacy = ContextMoments(**{name: arrays[_CONTEXT + name] for name in _CONTEXT_ARRAYS})
        return GivenMoments(_LEGACY_PAIR, _LEGACY_PAIR, (legacy,))
    if "contexts" not in description:
        return None
    columns = tuple(str(name) for name in description["contexts"]["columns"])
    attributes = tuple(str(name) for name in description["contexts"]["attributes"])
    moments = []
    for position in range(len(columns) * len(attributes)):
        prefix = f"{_CONTEXT}{position}."
        stored = {name: arrays[prefix + name] for name in _CONTEXT_ARRAYS}
        if prefix + "pooled" in arrays:
            stored["pooled"] = arrays[prefix + "pooled"]
        moments.append(ContextMoments(**stored))
    return GivenMoments(columns, attributes, tuple(moments))


def _stored_blocks(description: Mapping[str, Any], arrays: Mapping[str, NDArray[Any]]) -> tuple[AttributeBlock, ...]:
    blocks = []
    for position, entry in enumerate(description.get("attributes", [])):
        start, stop = (int(column) for column in entry["columns"])
        labels = None if entry["kind"] == "continuous" else arrays[f"{_BLOCK_LABELS}{position}"]
        blocks.append(AttributeBlock(str(entry["name"]), labels, start, stop, joint=entry["kind"] == "joint"))
    return tuple(blocks)


def _pins_description(artifact: MapArtifact) -> dict[str, Any]:
    # An artifact made in memory without pins (as decoded from format 1 or 2) keeps the format it came in.
    if artifact.pins is None:
        return {"format_version": 2}
    return {"format_version": FORMAT_VERSION, "pinned_coordinates": artifact.pins.coordinates.tolist()}


def _stored_pins(description: Mapping[str, Any], arrays: Mapping[str, NDArray[Any]]) -> CoordinatePins | None:
    if description["format_version"] < 3:
        return None
    own = {name.removeprefix(_PINS_PREFIX): array for name, array in arrays.items() if name.startswith(_PINS_PREFIX)}
    pins = CoordinatePins.from_arrays(own)
    if pins.coordinates.tolist() != description.get("pinned_coordinates"):
        raise ValueError("the pinned coordinates of the arrays and of the description differ")
    return pins


def artifact_description(artifact: MapArtifact) -> dict[str, Any]:
    """The artifact's JSON-safe description (everything but the arrays)."""
    return {
        **_pins_description(artifact),
        "method": artifact.method,
        "map_kind": artifact.kind,
        "params": _json_safe(dict(artifact.params)),
        "normalize": artifact.normalize,
        **artifact.map.describe(),
        "categorical": artifact.moments.labels is not None,
        **_blocks_description(artifact.moments),
        **_context_description(artifact.moments.given),
        "history": _json_safe(artifact.history),
    }


def content_digest(artifact: MapArtifact) -> str:
    """sha256 over the description and every array's name, dtype, shape and bytes, in name order."""
    return _digest(artifact_description(artifact), artifact_arrays(artifact))


def _digest(description: Mapping[str, Any], arrays: Mapping[str, NDArray[Any]]) -> str:
    digest = hashlib.sha256(json.dumps(description, sort_keys=True).encode())
    for name, array in sorted(arrays.items()):
        contiguous = np.ascontiguousarray(array)
        digest.update(f"{name}|{contiguous.dtype.str}|{contiguous.shape}".encode())
        digest.update(contiguous.tobytes())
    return digest.hexdigest()


def encode_artifact(artifact: MapArtifact) -> dict[str, bytes]:
    """The artifact as file contents by file name: ``arrays.npz`` and ``artifact.json``.

    Storage is the caller's business (a registry writes these files and makes
    them visible at once); the bytes are the same whoever stores them.
    """
    buffer = io.BytesIO()
    # No object arrays are ever written, so no reader ever needs pickle.
    np.savez(buffer, allow_pickle=False, **artifact_arrays(artifact))
    arrays_bytes = buffer.getvalue()
    description = artifact_description(artifact)
    description["arrays_sha256"] = hashlib.sha256(arrays_bytes).hexdigest()
    description["content_digest"] = content_digest(artifact)
    return {
        ARRAYS_FILE: arrays_bytes,
        DESCRIPTION_FILE: json.dumps(description, indent=2, sort_keys=True).encode(),
    }


def decode_artifact(files: Mapping[str, bytes], *, source: str = "artifact") -> MapArtifact:
    """Read and verify an artifact from the file contents :func:`encode_artifact` made.

    Parameters
    ----------
    files : mapping of str to bytes
        At least ``arrays.npz`` and ``artifact.json``.
    source : str
        Where the files came from, for error messages.

    Raises
    ------
    ArtifactFormatError
        A file is missing, a checksum or the content digest does not match,
        or the arrays are inconsistent.
    """
    for name in (DESCRIPTION_FILE, ARRAYS_FILE):
        if name not in files:
            raise ArtifactFormatError(f"{source}: {name} is missing")
    try:
        description = json.loads(files[DESCRIPTION_FILE].decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as error:
        raise ArtifactFormatError(f"{source}: {DESCRIPTION_FILE} is not valid JSON: {error}") from None
    if not isinstance(description, dict) or description.get("format_version") not in READABLE_FORMATS:
        readable = " or ".join(map(str, READABLE_FORMATS))
        raise ArtifactFormatError(f"{source}: {DESCRIPTION_FILE} is not a veil artifact of format {readable}")
    arrays_bytes = files[ARRAYS_FILE]
    if hashlib.sha256(arrays_bytes).hexdigest() != description.get("arrays_sha256"):
        raise ArtifactFormatError(
            f"{source}: {ARRAYS_FILE} does not match its sha256: the file is damaged or was changed"
        )
    try:
        with np.load(io.BytesIO(arrays_bytes), allow_pickle=False) as stored:
            arrays = {name: stored[name] for name in stored.files}
        artifact = MapArtifact(
            method=str(description["method"]),
            params=dict(description["params"]),
            map=_stored_map(description, arrays),
            normalize=bool(description["normalize"]),
            moments=MomentState(
                count=int(arrays["count"]),
                labels=arrays.get("labels"),
                blocks=_stored_blocks(description, arrays),
                partial=_stored_partial(description, arrays),
                given=_stored_context(description, arrays),
                **{name: arrays[name] for name in _MOMENT_ARRAYS},
            ),
            history=list(description["history"]),
            pins=_stored_pins(description, arrays),
        )
    except (KeyError, ValueError, TypeError, OSError, zipfile.BadZipFile) as error:
        raise ArtifactFormatError(f"{source} holds an unreadable artifact: {error}") from None
    # The digest is checked against what was written, in the format it was written in.
    if _digest(_stored_description(description), arrays) != description.get("content_digest"):
        raise ArtifactFormatError(f"{source}: the content digest does not match the stored one")
    return artifact


def _stored_map(description: Mapping[str, Any], arrays: Mapping[str, NDArray[Any]]) -> EmbeddingMap:
    if description["format_version"] == 1:
        return AffineLowRankMap.from_arrays(arrays)
    own = {name.removeprefix(_MAP_PREFIX): array for name, array in arrays.items() if name.startswith(_MAP_PREFIX)}
    return map_from_arrays(str(description["map_kind"]), own)


def _stored_description(description: Mapping[str, Any]) -> dict[str, Any]:
    """The description as :func:`artifact_description` made it: without the checksums added after hashing."""
    return {key: value for key, value in description.items() if key not in ("arrays_sha256", "content_digest")}
