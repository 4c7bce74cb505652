"""What the sync and async clients share: validation, encoding, decoding, batching and the retry policy."""

from __future__ import annotations

import io
import json
import random
import re
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, replace
from typing import Any

import httpx
import numpy as np
from numpy.typing import ArrayLike, NDArray

from veil_client.errors import (
    VeilClientError,
    VeilEmbeddingModelError,
    VeilHTTPError,
    VeilServerError,
    VeilValidationError,
)

NPY = "application/x-npy"
JSON = "application/json"
#: connect, read, write and pool timeouts in seconds: fail fast on connect, allow large batches to stream.
DEFAULT_TIMEOUT = httpx.Timeout(30.0, connect=5.0)
DEFAULT_BATCH_SIZE = 1024
RETRY_STATUSES = frozenset({503})
#: The header the client states its embedding model in, and the form the service accepts in it.
MODEL_HEADER = "X-Veil-Embedding-Model"
_MODEL_PART = re.compile(r"[A-Za-z0-9][A-Za-z0-9._/:+-]*")
MAX_MODEL_TEXT = 200


@dataclass(frozen=True)
class CleanedBatch:
    """Cleaned vectors, in input order, and the eraser version that cleaned every one of them."""

    vectors: NDArray[np.floating]
    version: str
    eraser: str


@dataclass(frozen=True)
class SearchVectors:
    """Query vectors for a raw (uncleaned) index, in input order, from one eraser version.

    ``vectors[i] = Aᵀ r(q_i)``: a raw inner-product index ranks by them as the
    index of the cleaned corpus ranks by the cleaned queries, exactly when
    ``exact`` is true (``note`` says why not otherwise).  ``offsets[i] =
    ⟨r(q_i), b⟩`` turns a raw inner product into the cleaned one (None for a
    map that is not affine).
    """

    vectors: NDArray[np.floating]
    offsets: NDArray[np.float64] | None
    exact: bool
    note: str
    version: str
    eraser: str


def as_matrix(vectors: ArrayLike) -> NDArray[np.floating]:
    """A 2-D float16/32/64 array of finite numbers, or :class:`VeilValidationError` before any request."""
    try:
        matrix = np.asarray(vectors)
    except (ValueError, TypeError) as error:
        raise VeilValidationError(f"vectors must be a 2-D array of numbers ({error})") from None
    if matrix.dtype.kind in "iu":
        matrix = matrix.astype(np.float32)
    if matrix.dtype.kind != "f":
        raise VeilValidationError(f"vectors must be numbers, got dtype {matrix.dtype}")
    if matrix.ndim != 2:
        raise VeilValidationError(f"vectors must be 2-D (rows × dimensions), got shape {matrix.shape}")
    if matrix.shape[0] == 0 or matrix.shape[1] == 0:
        raise VeilValidationError(f"vectors are empty (shape {matrix.shape})")
    if not np.isfinite(matrix).all():
        row = int(np.flatnonzero(~np.isfinite(matrix).all(axis=1))[0])
        raise VeilValidationError(f"row {row} holds NaN or infinite values")
    return matrix


def as_rows(vectors: ArrayLike) -> tuple[NDArray[np.floating], bool]:
    """The vectors as a matrix of rows, and whether one 1-D vector was given (its answer is then 1-D too)."""
    try:
        array = np.asarray(vectors)
    except (ValueError, TypeError):
        return as_matrix(vectors), False  # ragged or not numbers: as_matrix says which
    single = array.ndim == 1
    return as_matrix(array[None, :] if single else array), single


def one_vector(batch: CleanedBatch, single: bool) -> CleanedBatch:
    """The answer to one 1-D vector as a 1-D vector; any other answer as it is."""
    return replace(batch, vectors=batch.vectors[0]) if single else batch


def one_query(answer: SearchVectors, single: bool) -> SearchVectors:
    """The answer to one 1-D query as a 1-D vector (its offset a 0-d array); any other answer as it is."""
    if not single:
        return answer
    offsets = None if answer.offsets is None else answer.offsets.reshape(())
    return replace(answer, vectors=answer.vectors[0], offsets=offsets)


def batches(matrix: NDArray[np.floating], size: int) -> Iterator[NDArray[np.floating]]:
    for start in range(0, matrix.shape[0], size):
        yield matrix[start : start + size]


#: A counterfactual's target: a class, or for a version of several attributes each one's class or value.
Target = str | Mapping[str, str | float]
#: Live-check labels: one attribute's, or several attributes' by name (numbers for a continuous one).
Labels = list[str] | Mapping[str, list[str] | list[float]]


def target_params(target: Target) -> dict[str, str]:
    """The query of a counterfactual: the class itself, or the targets by attribute as a JSON object."""
    if isinstance(target, str):
        return {"target": target}
    if not isinstance(target, Mapping) or not target:
        raise VeilValidationError("the target is a class (text) or a mapping of each attribute to its target")
    return {"target": json.dumps({str(k): v if isinstance(v, (int, float)) else str(v) for k, v in target.items()})}


def encode(matrix: NDArray[np.floating], wire: str, extra: dict[str, Any] | None = None) -> tuple[bytes, str]:
    if wire == NPY:
        buffer = io.BytesIO()
        np.save(buffer, np.ascontiguousarray(matrix.astype(matrix.dtype.newbyteorder("<"), copy=False)))
        return buffer.getvalue(), NPY
    return json.dumps({"vectors": matrix.tolist(), **(extra or {})}).encode(), JSON


def decode(response: httpx.Response) -> NDArray[np.floating]:
    media = response.headers.get("content-type", "").split(";")[0].strip()
    if media == NPY:
        array: NDArray[np.floating] = np.load(io.BytesIO(response.content), allow_pickle=False)
        return array
    return np.asarray(response.json()["vectors"], dtype=np.float32)


def search_vectors_of(answers: list[httpx.Response]) -> SearchVectors:
    """The JSON answers of the batches of one ``search-vector`` call, put back together in order."""
    bodies = [answer.json() for answer in answers]
    offsets = [body["offsets"] for body in bodies]
    return SearchVectors(
        vectors=np.concatenate([np.asarray(body["vectors"], dtype=np.float32) for body in bodies]),
        offsets=None if offsets[0] is None else np.concatenate([np.asarray(o, dtype=np.float64) for o in offsets]),
        exact=bool(bodies[0]["exact"]),
        note=str(bodies[0]["note"]),
        version=answers[0].headers.get("x-veil-version", ""),
        eraser=answers[0].headers.get("x-veil-eraser", ""),
    )


def raise_for_error(response: httpx.Response) -> None:
    if response.status_code < 400:
        return
    code, message = "unknown", response.text[:500]
    error: Any = {}
    try:
        error = response.json()["error"]
        code, message = str(error["code"]), str(error["message"])
    except (ValueError, KeyError, TypeError):
        pass
    if code == "embedding_model_mismatch":
        stated, recorded = str(error.get("stated", "")), str(error.get("recorded", ""))
        raise VeilEmbeddingModelError(response.status_code, code, message, stated=stated, recorded=recorded)
    kind: type[VeilHTTPError] = VeilClientError if response.status_code < 500 else VeilServerError
    raise kind(response.status_code, code, message)


@dataclass(frozen=True)
class RetryPolicy:
    """Exponential backoff with full jitter: wait ``uniform(0.5, 1) × min(cap, base × 2**attempt)``."""

    retries: int = 3
    base: float = 0.2
    cap: float = 5.0

    def delay(self, attempt: int, rng: random.Random) -> float:
        return float(min(self.cap, self.base * 2**attempt) * rng.uniform(0.5, 1.0))


def pin_headers(version: str | None, alias: str | None) -> dict[str, str]:
    if version is not None and alias is not None:
        raise VeilValidationError("pin a version or an alias, not both")
    if version is not None:
        return {"X-Veil-Version": version}
    if alias is not None:
        return {"X-Veil-Alias": alias}
    return {}


def model_header(model: str | None) -> dict[str, str]:
    """The header stating ``model`` (``NAME`` or ``NAME@VERSION``), checked as the service checks it; {} for None."""
    if model is None:
        return {}
    form = (
        "NAME or NAME@VERSION, each starting with a letter or digit and holding only letters, digits and . _ / : + - "
        f"(at most {MAX_MODEL_TEXT} characters in all)"
    )
    if not isinstance(model, str):
        raise VeilValidationError(f"embedding_model is {form}; got {type(model).__name__}")
    text = model.strip()
    name, at, version = text.partition("@")
    parts = [name, version] if at else [name]
    if not all(_MODEL_PART.fullmatch(part) for part in parts) or len(text) > MAX_MODEL_TEXT:
        raise VeilValidationError(f"embedding_model is {form}; got {model!r}")
    return {MODEL_HEADER: text}


class ClientSettings:
    """The configuration both clients carry: the headers of every request (token, embedding model) and more."""

    def __init__(
        self,
        *,
        token: str | None,
        batch_size: int,
        wire: str,
        retry: RetryPolicy,
        seed: int | None,
        embedding_model: str | None = None,
    ) -> None:
        if batch_size < 1:
            raise VeilValidationError(f"batch_size must be at least 1, got {batch_size}")
        if wire not in ("npy", "json"):
            raise VeilValidationError(f"format must be 'npy' or 'json', got {wire!r}")
        self.headers = {} if token is None else {"Authorization": f"Bearer {token}"}
        self.headers.update(model_header(embedding_model))
        self.batch_size = batch_size
        self.wire = NPY if wire == "npy" else JSON
        self.retry = retry
        self.rng = random.Random(seed)


@dataclass(frozen=True)
class RecentTraffic:
    """A replica's sample of the distinct raw vectors it has recently cleaned for an eraser.

    ``traffic_seen`` is how many vectors the sample stands for (every vector
    the replica cleaned since the sample began, repeats included): the weight
    of this replica's share when samples of several replicas are merged.
    """

    vectors: NDArray[np.float32]
    traffic_seen: int
    version: str
    eraser: str


def recent_traffic_of(response: httpx.Response) -> RecentTraffic:
    """The ``.npy`` answer of ``GET /v1/erasers/{name}/recent`` with what its headers say."""
    return RecentTraffic(
        vectors=np.asarray(decode(response), dtype=np.float32),
        traffic_seen=int(response.headers["x-veil-traffic-seen"]),
        version=response.headers["x-veil-version"],
        eraser=response.headers["x-veil-eraser"],
    )
