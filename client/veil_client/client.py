"""``VeilClient`` (sync) and ``AsyncVeilClient`` (async) on httpx; shared logic is in :mod:`veil_client._base`."""

from __future__ import annotations

import asyncio
import itertools
import time
from collections.abc import Mapping, Sequence
from types import TracebackType
from typing import Any, Self

import httpx
import numpy as np
from numpy.typing import ArrayLike, NDArray

from veil_client._base import (
    DEFAULT_BATCH_SIZE,
    DEFAULT_TIMEOUT,
    JSON,
    NPY,
    RETRY_STATUSES,
    CleanedBatch,
    ClientSettings,
    Labels,
    RecentTraffic,
    RetryPolicy,
    SearchVectors,
    Target,
    as_matrix,
    as_rows,
    batches,
    decode,
    encode,
    one_query,
    one_vector,
    pin_headers,
    raise_for_error,
    recent_traffic_of,
    search_vectors_of,
    target_params,
)
from veil_client.errors import VeilTransportError, VeilValidationError

DEFAULT_URL = "http://127.0.0.1:8080"


class _Requests:
    """Request shapes both clients send; each client only adds how to send them."""

    settings: ClientSettings

    def _configure(
        self, *, token: str | None, batch_size: int, encoding: str, retries: int, backoff: float, max_backoff: float,
        seed: int | None, embedding_model: str | None,
    ) -> None:  # fmt: skip
        self.settings = ClientSettings(
            token=token,
            batch_size=batch_size,
            wire=encoding,
            retry=RetryPolicy(retries, backoff, max_backoff),
            seed=seed,
            embedding_model=embedding_model,
        )

    def _retry_after_error(self, method: str, path: str, attempt: int, error: httpx.TransportError) -> float:
        """The wait before the next attempt, or :class:`VeilTransportError` when retries are spent."""
        if attempt >= self.settings.retry.retries:
            raise VeilTransportError(f"{method} {path}: {type(error).__name__}: {error}") from error
        return self.settings.retry.delay(attempt, self.settings.rng)

    def _retry_after_response(self, response: httpx.Response, attempt: int) -> float | None:
        """None if ``response`` is final (an error status raised), else the wait before the next attempt."""
        if response.status_code not in RETRY_STATUSES or attempt >= self.settings.retry.retries:
            raise_for_error(response)
            return None
        return self.settings.retry.delay(attempt, self.settings.rng)

    def _batch_request(self, batch: NDArray[np.floating], pin: dict[str, str]) -> dict[str, Any]:
        body, media = encode(batch, self.settings.wire)
        return {"content": body, "headers": {**pin, "Content-Type": media, "Accept": media}}

    def _search_request(
        self, batch: NDArray[np.floating], pin: dict[str, str], metric: str, exact: bool
    ) -> dict[str, Any]:
        # Answers come back as JSON, the only format that carries the offsets and the exactness note.
        request = self._batch_request(batch, pin)
        request["headers"]["Accept"] = JSON
        return {**request, "params": {"metric": metric, "exact": "true" if exact else "false"}}

    def _drift_request(
        self,
        vectors: ArrayLike | None,
        labels: Labels | None,
        version: str | None,
        alias: str | None,
        context: Sequence[object] | None = None,
    ) -> dict[str, Any]:
        pin = pin_headers(version, alias)
        if vectors is None:
            if labels is not None or context is not None:
                raise VeilValidationError("labels and context values go with the vectors they describe")
            return {"method": "GET", "headers": pin}
        matrix = as_matrix(vectors)
        fields: dict[str, Any] = {}
        if labels is not None:
            fields["labels"] = _drift_labels(labels, matrix.shape[0])
        if context is not None:
            if isinstance(context, (str, bytes)) or len(context) != matrix.shape[0]:
                count = "a string of" if isinstance(context, (str, bytes)) else len(context)
                raise VeilValidationError(f"got {count} context values for {matrix.shape[0]} vectors")
            # Context values are compared as text by the service, as class labels are.
            fields["context"] = [str(value) for value in context]
        # Labels and context values travel in JSON; vectors alone in the client's wire format.
        body, media = encode(matrix, JSON, fields) if fields else encode(matrix, self.settings.wire)
        return {"method": "POST", "content": body, "headers": {**pin, "Content-Type": media}}


def _drift_labels(labels: Labels, rows: int) -> Any:
    """Labels as the drift route takes them: a list of text, or by attribute (numbers for a continuous one)."""
    given = labels if isinstance(labels, Mapping) else {"": labels}
    # By attribute, a continuous attribute's values travel as numbers; class labels always as text.
    texts = {
        attribute: [_as_number(label) if attribute and _is_number(label) else str(label) for label in column]
        for attribute, column in given.items()
    }
    for attribute, column in texts.items():
        if len(column) != rows:
            of = f" of {attribute!r}" if attribute else ""
            raise VeilValidationError(f"got {len(column)} labels{of} for {rows} vectors")
    return texts if isinstance(labels, Mapping) else texts[""]


def _is_number(value: object) -> bool:
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, (bool, np.bool_))


def _as_number(value: Any) -> int | float:
    return int(value) if isinstance(value, (int, np.integer)) else float(value)


def _combine(parts: list[NDArray[np.floating]], responses: list[httpx.Response]) -> CleanedBatch:
    return CleanedBatch(
        vectors=np.concatenate(parts),
        version=responses[0].headers.get("x-veil-version", ""),
        eraser=responses[0].headers.get("x-veil-eraser", ""),
    )


class VeilClient(_Requests):
    """A blocking client of the veil service.

    Parameters
    ----------
    base_url : str
        The service, e.g. ``http://veil.internal:8080``.
    token : str, optional
        Bearer token (the data token, or the admin token for :meth:`reload`).
    timeout : httpx.Timeout or float
        Default: 5 s to connect, 30 s for everything else.
    batch_size : int, default=1024
        Rows per request; larger inputs are split and put back together in order.
    encoding : {"npy", "json"}, default="npy"
        Binary ``.npy`` transport (fast) or JSON.
    retries, backoff, max_backoff : int, float, float
        Retries on connection errors and 503 only, with exponential backoff and jitter.
    transport, http_client
        An httpx transport (``MockTransport`` in tests) or a ready ``httpx.Client``.
    embedding_model : str, optional
        The embedding model that made your vectors, ``NAME`` or ``NAME@VERSION`` (e.g.
        ``"sentence-transformers/all-MiniLM-L6-v2@2.2.0"``), sent as ``X-Veil-Embedding-Model`` on every request:
        a version fitted on another model refuses the vectors with :class:`VeilEmbeddingModelError` (never
        retried).  Without it, or for a version that records no model, only the dimension is checked.
    """

    def __init__(
        self,
        base_url: str = DEFAULT_URL,
        *,
        token: str | None = None,
        timeout: httpx.Timeout | float = DEFAULT_TIMEOUT,
        batch_size: int = DEFAULT_BATCH_SIZE,
        encoding: str = "npy",
        retries: int = 3,
        backoff: float = 0.2,
        max_backoff: float = 5.0,
        transport: httpx.BaseTransport | None = None,
        http_client: httpx.Client | None = None,
        seed: int | None = None,
        embedding_model: str | None = None,
    ) -> None:
        self._configure(
            token=token, batch_size=batch_size, encoding=encoding, retries=retries, backoff=backoff,
            max_backoff=max_backoff, seed=seed, embedding_model=embedding_model,
        )  # fmt: skip
        self._http = http_client or httpx.Client(base_url=base_url, timeout=timeout, transport=transport)

    def _send(self, method: str, path: str, **request: Any) -> httpx.Response:
        headers = {**self.settings.headers, **request.pop("headers", {})}
        for attempt in itertools.count():
            try:
                response = self._http.request(method, path, headers=headers, **request)
            except httpx.TransportError as error:
                delay = self._retry_after_error(method, path, attempt, error)
            else:
                wait = self._retry_after_response(response, attempt)
                if wait is None:
                    return response
                delay = wait
            time.sleep(delay)
        raise AssertionError("unreachable: itertools.count() never ends")

    def _clean(
        self, path: str, vectors: ArrayLike, version: str | None, alias: str | None, params: dict[str, str]
    ) -> CleanedBatch:
        (matrix, single), pin = as_rows(vectors), pin_headers(version, alias)
        parts, responses = [], []
        for batch in batches(matrix, self.settings.batch_size):
            response = self._send("POST", path, params=params, **self._batch_request(batch, pin))
            # Every later batch is pinned to the version the first one got: one result, one version.
            pin = {"X-Veil-Version": response.headers["x-veil-version"]}
            parts.append(decode(response))
            responses.append(response)
        return one_vector(_combine(parts, responses), single)

    def apply(
        self, name: str, vectors: ArrayLike, *, version: str | None = None, alias: str | None = None
    ) -> CleanedBatch:
        """Erase the attribute from ``vectors`` (shape (n, d)), in order; one vector of shape (d,) gets one back."""
        return self._clean(f"/v1/erasers/{name}/apply", vectors, version, alias, {})

    def counterfactual(
        self, name: str, vectors: ArrayLike, target: Target, *, version: str | None = None, alias: str | None = None
    ) -> CleanedBatch:
        """Erase, then give every vector the attribute component of class ``target``.

        For a version of several attributes, ``target`` names each one's
        class (or, for a continuous one, its value), e.g.
        ``{"pronoun": "she", "age_bracket": "over 50"}``.
        """
        return self._clean(f"/v1/erasers/{name}/counterfactual", vectors, version, alias, target_params(target))

    def search_vectors(
        self,
        name: str,
        queries: ArrayLike,
        *,
        metric: str = "inner_product",
        exact: bool = False,
        version: str | None = None,
        alias: str | None = None,
    ) -> SearchVectors:
        """Vectors that search a raw (uncleaned) index as the index of the cleaned corpus would rank.

        Parameters
        ----------
        name : str
            The eraser.
        queries : array-like of shape (n_queries, dim)
            Raw query embeddings.
        metric : {"inner_product", "cosine", "l2"}, default="inner_product"
            The raw index's metric; only an inner-product index can be searched exactly.
        exact : bool, default=False
            Raise :class:`VeilClientError` (``inexact_search``) rather than accept an inexact answer.
        version, alias : str, optional
            The version (id or sequence number) or alias the corpus would be cleaned with; at most one.

        Returns
        -------
        SearchVectors
            ``vectors`` (n_queries, dim), ``offsets`` (n_queries,) or None, ``exact``, ``note``, ``version``.
        """
        (matrix, single), pin = as_rows(queries), pin_headers(version, alias)
        answers = []
        for batch in batches(matrix, self.settings.batch_size):
            request = self._search_request(batch, pin, metric, exact)
            answer = self._send("POST", f"/v1/erasers/{name}/search-vector", **request)
            pin = {"X-Veil-Version": answer.headers["x-veil-version"]}
            answers.append(answer)
        return one_query(search_vectors_of(answers), single)

    def drift(
        self,
        name: str,
        vectors: ArrayLike | None = None,
        labels: Labels | None = None,
        *,
        context: Sequence[object] | None = None,
        version: str | None = None,
        alias: str | None = None,
    ) -> dict[str, Any]:
        """Drift and leakage of a sample of raw live vectors, or of the replica's recent traffic if none is given.

        Parameters
        ----------
        name : str
            The eraser.
        vectors : array-like of shape (n_vectors, dim), optional
            Raw live embeddings (what callers send to :meth:`apply`), at least 20 rows; without them the
            service checks the distinct vectors it has recently cleaned for ``name``.
        labels : list of str of length n_vectors, or mapping of str to such lists, optional
            The attribute's class of each vector; without them the probe predicts pseudo-labels.  For a
            version of several attributes, a mapping gives each attribute's labels (the others get
            pseudo-labels); a list is the first attribute's.
        context : sequence of length n_vectors, optional
            Each vector's value of a context column (a field, a query's category): the leakage is then also
            measured within each value, against what the context alone tells (the report's ``context`` and
            ``context_leakage_gap``).  Without it, the population's figures only.
        version, alias : str, optional
            Check against this version (id or sequence number) or the version this alias names, instead of
            the one served; at most one of the two.

        Returns
        -------
        dict
            The report: ``status``, ``reasons``, the figures, ``rows`` (vectors checked), and the ``version``
            checked; on recent traffic also ``traffic_seen`` (every vector cleaned, repeats included).  ``rule``
            says what judged the status: ``"calibrated"`` (each figure's p-value against the version's own
            no-drift draws at this sample size in ``p_values``, Holm-adjusted in ``adjusted_p_values``, at the
            family-wise ``levels``) or ``"fixed levels"`` (a version stored before calibration: the card's
            warn and alert bands; ``p_values`` and ``levels`` are then null).  ``not_judged`` names the
            figures neither rule judged (a class-mean gap the version stored no draws for).
        """
        request = self._drift_request(vectors, labels, version, alias, context)
        result: dict[str, Any] = self._send(request.pop("method"), f"/v1/erasers/{name}/drift", **request).json()
        return result

    def recent(self, name: str) -> RecentTraffic:
        """The replica's sample of the distinct raw vectors it has recently cleaned for ``name``.

        Returns
        -------
        RecentTraffic
            ``vectors`` (n, dim) float32 (no rows before any traffic), ``traffic_seen`` (every vector the
            replica cleaned since the sample began, repeats included), the ``version`` it serves.
        """
        return recent_traffic_of(self._send("GET", f"/v1/erasers/{name}/recent", headers={"Accept": NPY}))

    def erasers(self) -> list[dict[str, Any]]:
        result: list[dict[str, Any]] = self._send("GET", "/v1/erasers").json()["erasers"]
        return result

    def eraser(self, name: str) -> dict[str, Any]:
        result: dict[str, Any] = self._send("GET", f"/v1/erasers/{name}").json()
        return result

    def ready(self) -> dict[str, Any]:
        result: dict[str, Any] = self._send("GET", "/readyz").json()
        return result

    def reload(self) -> dict[str, Any]:
        """Ask the service to re-resolve its aliases now (needs the admin token)."""
        result: dict[str, Any] = self._send("POST", "/v1/admin/reload").json()
        return result

    def close(self) -> None:
        self._http.close()

    def __enter__(self) -> Self:
        return self

    def __exit__(
        self, kind: type[BaseException] | None, error: BaseException | None, trace: TracebackType | None
    ) -> None:
        self.close()


class AsyncVeilClient(_Requests):
    """The asyncio twin of :class:`VeilClient`: the same parameters, every method awaitable."""

    def __init__(
        self,
        base_url: str = DEFAULT_URL,
        *,
        token: str | None = None,
        timeout: httpx.Timeout | float = DEFAULT_TIMEOUT,
        batch_size: int = DEFAULT_BATCH_SIZE,
        encoding: str = "npy",
        retries: int = 3,
        backoff: float = 0.2,
        max_backoff: float = 5.0,
        transport: httpx.AsyncBaseTransport | None = None,
        http_client: httpx.AsyncClient | None = None,
        seed: int | None = None,
        embedding_model: str | None = None,
    ) -> None:
        self._configure(
            token=token, batch_size=batch_size, encoding=encoding, retries=retries, backoff=backoff,
            max_backoff=max_backoff, seed=seed, embedding_model=embedding_model,
        )  # fmt: skip
        self._http = http_client or httpx.AsyncClient(base_url=base_url, timeout=timeout, transport=transport)

    async def _send(self, method: str, path: str, **request: Any) -> httpx.Response:
        headers = {**self.settings.headers, **request.pop("headers", {})}
        for attempt in itertools.count():
            try:
                response = await self._http.request(method, path, headers=headers, **request)
            except httpx.TransportError as error:
                delay = self._retry_after_error(method, path, attempt, error)
            else:
                wait = self._retry_after_response(response, attempt)
                if wait is None:
                    return response
                delay = wait
            await asyncio.sleep(delay)
        raise AssertionError("unreachable: itertools.count() never ends")

    async def _clean(
        self, path: str, vectors: ArrayLike, version: str | None, alias: str | None, params: dict[str, str]
    ) -> CleanedBatch:
        (matrix, single), pin = as_rows(vectors), pin_headers(version, alias)
        parts, responses = [], []
        for batch in batches(matrix, self.settings.batch_size):
            response = await self._send("POST", path, params=params, **self._batch_request(batch, pin))
            pin = {"X-Veil-Version": response.headers["x-veil-version"]}
            parts.append(decode(response))
            responses.append(response)
        return one_vector(_combine(parts, responses), single)

    async def apply(
        self, name: str, vectors: ArrayLike, *, version: str | None = None, alias: str | None = None
    ) -> CleanedBatch:
        return await self._clean(f"/v1/erasers/{name}/apply", vectors, version, alias, {})

    async def counterfactual(
        self, name: str, vectors: ArrayLike, target: Target, *, version: str | None = None, alias: str | None = None
    ) -> CleanedBatch:
        return await self._clean(f"/v1/erasers/{name}/counterfactual", vectors, version, alias, target_params(target))

    async def search_vectors(
        self,
        name: str,
        queries: ArrayLike,
        *,
        metric: str = "inner_product",
        exact: bool = False,
        version: str | None = None,
        alias: str | None = None,
    ) -> SearchVectors:
        """As :meth:`VeilClient.search_vectors`."""
        (matrix, single), pin = as_rows(queries), pin_headers(version, alias)
        answers = []
        for batch in batches(matrix, self.settings.batch_size):
            request = self._search_request(batch, pin, metric, exact)
            answer = await self._send("POST", f"/v1/erasers/{name}/search-vector", **request)
            pin = {"X-Veil-Version": answer.headers["x-veil-version"]}
            answers.append(answer)
        return one_query(search_vectors_of(answers), single)

    async def drift(
        self,
        name: str,
        vectors: ArrayLike | None = None,
        labels: Labels | None = None,
        *,
        context: Sequence[object] | None = None,
        version: str | None = None,
        alias: str | None = None,
    ) -> dict[str, Any]:
        """As :meth:`VeilClient.drift`: a posted sample, or recent traffic; ``version`` or ``alias`` pins one."""
        request = self._drift_request(vectors, labels, version, alias, context)
        response = await self._send(request.pop("method"), f"/v1/erasers/{name}/drift", **request)
        result: dict[str, Any] = response.json()
        return result

    async def recent(self, name: str) -> RecentTraffic:
        """As :meth:`VeilClient.recent`: the replica's sample of its recent raw vectors for ``name``."""
        return recent_traffic_of(await self._send("GET", f"/v1/erasers/{name}/recent", headers={"Accept": NPY}))

    async def erasers(self) -> list[dict[str, Any]]:
        result: list[dict[str, Any]] = (await self._send("GET", "/v1/erasers")).json()["erasers"]
        return result

    async def eraser(self, name: str) -> dict[str, Any]:
        result: dict[str, Any] = (await self._send("GET", f"/v1/erasers/{name}")).json()
        return result

    async def ready(self) -> dict[str, Any]:
        result: dict[str, Any] = (await self._send("GET", "/readyz")).json()
        return result

    async def reload(self) -> dict[str, Any]:
        result: dict[str, Any] = (await self._send("POST", "/v1/admin/reload")).json()
        return result

    async def aclose(self) -> None:
        await self._http.aclose()

    async def __aenter__(self) -> Self:
        return self

    async def __aexit__(
        self, kind: type[BaseException] | None, error: BaseException | None, trace: TracebackType | None
    ) -> None:
        await self.aclose()
