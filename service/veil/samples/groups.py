"""A group column (``--group COLUMN``): an author, an account, a first name or a site that rows share.

The column is read exactly as a context column (``--given``) is, from an
``.npz``, an ``.npy`` with a ``.csv`` of labels or a Parquet file, whole or
streamed, a missing value refused or its row dropped like a missing label:
the sample is opened with the group among its context columns, and
:func:`with_group` then moves it out of them into each chunk's ``group``.
A group guards nothing (the fit does not read it); it decides the held-out
split (whole groups, :func:`veil.samples.splitting.held_out_groups`) and the
readers' folds (each group in one fold, :mod:`veil.audit.groups`).
"""

from __future__ import annotations

import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from veil.defaults import STREAM_CHUNK_ROWS
from veil.errors import DataError
from veil.samples.chunks import Chunk, Partition, Sample


def columns_to_read(given: str | Sequence[str] | None, group: str | None) -> tuple[str, ...] | None:
    """The context columns to open a sample with so that the group is read as they are (None: no column)."""
    contexts = () if given is None else (given,) if isinstance(given, str) else tuple(given)
    if group is None:
        return contexts or None
    if group in contexts:
        raise DataError(
            f"{group!r} is given both as a context (--given) and as the group (--group): a group is kept whole in "
            "one fold, a context is guarded within; name another column for one of them"
        )
    return (*contexts, group)


@dataclass(frozen=True, eq=False)
class GroupedPartition:
    """A partition whose chunks carry the group column as ``group`` rather than among their contexts."""

    inner: Partition
    column: str

    @property
    def stop(self) -> int:
        return self.inner.stop

    def load(self) -> Chunk:
        chunk = self.inner.load()
        contexts = {key: values for key, values in chunk.contexts.items() if key != self.column}
        return dataclasses.replace(chunk, contexts=contexts, group=chunk.contexts[self.column])


class GroupedSample:
    """A sample read with its group column among the contexts, seen as a sample with that column as its group.

    Everything else is the inner sample's (its files, fingerprint, notes, rows).
    """

    def __init__(self, inner: Sample, column: str) -> None:
        if column not in inner.context_keys:
            raise ValueError(f"the sample was not read with the group column {column!r}")
        self.inner = inner
        self.group_key = column

    @property
    def context_keys(self) -> tuple[str, ...]:
        return tuple(key for key in self.inner.context_keys if key != self.group_key)

    def partitions(self, chunk_rows: int = STREAM_CHUNK_ROWS) -> list[GroupedPartition]:
        return [GroupedPartition(part, self.group_key) for part in self.inner.partitions(chunk_rows)]

    def __getattr__(self, name: str) -> Any:
        return getattr(self.inner, name)


def with_group(sample: Sample, column: str | None) -> Sample:
    """``sample`` with ``column`` (read among its contexts) as its group; ``sample`` itself without one."""
    if column is None:
        return sample
    grouped: Sample = GroupedSample(sample, column)
    return grouped


def group_key(sample: object) -> str | None:
    """The sample's group column (None: it has none)."""
    key = getattr(sample, "group_key", None)
    return key if isinstance(key, str) else None
