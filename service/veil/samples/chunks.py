"""What the fitting job reads from every sample, in memory or streamed: partitions that load as chunks of rows.

A row is known by its index in the files, so the held-out split (a hash of
that index, see :mod:`veil.samples.splitting`) is the same however the rows
are chunked, whichever rows were dropped for a missing label, and on every
worker.  An in-memory sample is one partition; a streamed one is many.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Protocol

import numpy as np
from numpy.typing import NDArray

from veil.samples.embedding_model import EmbeddingModel


@dataclass(frozen=True, eq=False)
class Chunk:
    """Labelled rows of a sample, each with its index in the files.

    Attributes
    ----------
    index : ndarray of shape (n,), int64
        Index of each row in the files (increasing).
    embeddings : ndarray of shape (n, d)
    attribute : ndarray of shape (n,)
        Labels, or rows of an attribute table (see :mod:`veil.samples.attributes`).
    task : ndarray of shape (n,) or None
    contexts : mapping of str to ndarray of shape (n,)
        Each row's value of every context column the attribute is guarded within (``veil fit --given``), by
        column; empty without one.
    group : ndarray of shape (n,) or None
        Each row's group (an author, an account, a first name, a site: ``veil fit --group``), kept whole on one
        side of the held-out split and in one fold of every reader; None without one.
    """

    index: NDArray[np.int64]
    embeddings: NDArray[np.floating]
    attribute: NDArray[Any]
    task: NDArray[Any] | None
    contexts: Mapping[str, NDArray[Any]] = field(default_factory=dict)
    group: NDArray[Any] | None = None

    @classmethod
    def of_rows(
        cls,
        start: int,
        embeddings: NDArray[np.floating],
        attribute: NDArray[Any],
        task: NDArray[Any] | None,
        missing: NDArray[np.bool_] | None = None,
        contexts: Mapping[str, NDArray[Any]] | None = None,
    ) -> Chunk:
        """Rows ``start, start + 1, …`` of the files, less those ``missing`` marks as lacking a label."""
        index = np.arange(start, start + embeddings.shape[0], dtype=np.int64)
        every = {} if contexts is None else {key: np.asarray(values) for key, values in contexts.items()}
        if missing is None or not missing.any():
            return cls(index, embeddings, np.asarray(attribute), _array(task), every)
        kept = ~missing
        return cls(
            index[kept],
            embeddings[kept],
            np.asarray(attribute)[kept],
            _rows(task, kept),
            {key: values[kept] for key, values in every.items()},
        )

    def __len__(self) -> int:
        return int(self.index.shape[0])


def _array(values: NDArray[Any] | None) -> NDArray[Any] | None:
    return None if values is None else np.asarray(values)


def _rows(values: NDArray[Any] | None, kept: NDArray[np.bool_]) -> NDArray[Any] | None:
    return None if values is None else np.asarray(values)[kept]


class Partition(Protocol):
    """A self-contained piece of a sample that any process can load on its own."""

    @property
    def stop(self) -> int:
        """Index in the files just past the partition's last row (for progress reports)."""
        ...

    def load(self) -> Chunk:
        """Read the partition's labelled rows (checked for finite numbers)."""
        ...


class Sample(Protocol):
    """A labelled sample as the fitting job sees it, whatever holds it."""

    @property
    def labelled_rows(self) -> int:
        """Rows with every label present: the rows the job uses."""
        ...

    @property
    def dropped_rows(self) -> int:
        """Rows of the files dropped for a missing label."""
        ...

    @property
    def attribute_table(self) -> bool:
        """Whether the attribute is a table of several attributes (or a continuous one), not one label column."""
        ...

    @property
    def attribute_dtype(self) -> np.dtype[Any] | None:
        """The dtype of the attribute table (it marks which attributes are continuous); None for label columns."""
        ...

    @property
    def dim(self) -> int: ...
    @property
    def dtype(self) -> np.dtype[Any]: ...
    @property
    def attribute_key(self) -> str: ...
    @property
    def task_key(self) -> str | None: ...
    @property
    def context_keys(self) -> tuple[str, ...]:
        """The context columns the attribute is guarded within, each on its own (empty: the population only)."""
        ...

    @property
    def embedding_model(self) -> EmbeddingModel | None:
        """The embedding model the sample file states made its vectors (None: it states none)."""
        ...

    @property
    def files(self) -> dict[str, str]: ...
    @property
    def fingerprint(self) -> str: ...

    def partitions(self, chunk_rows: int) -> Sequence[Partition]:
        """The sample in row order, in pieces of about ``chunk_rows`` rows (one piece for a sample in memory)."""
        ...


@dataclass(frozen=True, eq=False)
class InMemoryPartition:
    """A sample held in memory, as one partition."""

    chunk: Chunk
    stop: int

    def load(self) -> Chunk:
        return self.chunk
