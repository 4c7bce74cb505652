"""Client library for the veil service: NumPy arrays in, cleaned arrays out.

>>> from veil_client import VeilClient
>>> with VeilClient("http://veil.internal:8080") as veil:          # doctest: +SKIP
...     result = veil.apply("profiles-minilm", embeddings)
...     result.vectors, result.version

``VeilClient`` blocks; ``AsyncVeilClient`` is its asyncio twin.  Both send
binary ``.npy`` by default (``encoding="json"`` for JSON), split large inputs
into batches of ``batch_size`` rows and put the results back in order, pin
every later batch to the version the first one got (so one result never mixes
versions), retry connection errors and 503 with exponential backoff and
jitter (never a 4xx), and use explicit default timeouts (5 s connect, 30 s
otherwise).  ``embedding_model="NAME@VERSION"`` states the model that made
your vectors on every request: a version fitted on another model refuses
them (``VeilEmbeddingModelError``) instead of moving them meaninglessly.

Exceptions (all subclasses of :class:`VeilError`)::

    VeilError
    ├── VeilValidationError     refused before any request: not 2-D, empty, NaN/Inf, not numbers
    ├── VeilTransportError      not reachable / timed out, after every retry
    └── VeilHTTPError           the service answered an error: .status, .code, .message
        ├── VeilClientError     4xx (wrong_dimension, unknown_eraser, ...): never retried
        │   └── VeilEmbeddingModelError   409 embedding_model_mismatch: .stated, .recorded
        └── VeilServerError     5xx (a 503 only after every retry)
"""

from veil_client._base import DEFAULT_BATCH_SIZE, DEFAULT_TIMEOUT, CleanedBatch, RecentTraffic, SearchVectors
from veil_client.client import AsyncVeilClient, VeilClient
from veil_client.errors import (
    VeilClientError,
    VeilEmbeddingModelError,
    VeilError,
    VeilHTTPError,
    VeilServerError,
    VeilTransportError,
    VeilValidationError,
)

__all__ = [
    "DEFAULT_BATCH_SIZE",
    "DEFAULT_TIMEOUT",
    "AsyncVeilClient",
    "CleanedBatch",
    "RecentTraffic",
    "SearchVectors",
    "VeilClient",
    "VeilClientError",
    "VeilEmbeddingModelError",
    "VeilError",
    "VeilHTTPError",
    "VeilServerError",
    "VeilTransportError",
    "VeilValidationError",
]
