"""Labelled samples too large for memory, read in chunks: memory-mapped ``.npy``, a folder of ``.npy`` shards, Parquet.

=======================  ======================================================================
input                    embeddings, and where the labels come from
=======================  ======================================================================
``x.npy``                read by rows; ``--labels`` a ``.npy`` (memory-mapped) or ``.csv``
a folder of ``*.npy``    the shards in name order, as one array; ``--labels`` covers every row
Parquet                  row group by row group; label columns read with their rows
=======================  ======================================================================

Only one chunk of embeddings is in memory at a time.  Labels from a ``.csv``
are read whole (a few bytes a row); ``.npy`` labels are memory-mapped.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil.defaults import STREAM_CHUNK_ROWS
from veil.errors import DataError
from veil.samples.chunks import Chunk
from veil.samples.embedding_model import EmbeddingModel
from veil.samples.labels import arrow_labels, missing_labels, rows_to_keep
from veil.samples.sources import (
    PARQUET_SUFFIXES,
    AttributeSpec,
    ReadLabels,
    check_embeddings,
    context_keys_of,
    csv_columns,
    file_sha256,
    fingerprint_of,
    label_keys,
    labels_of,
    parse_merge,
)
from veil.samples.tables import embedding_matrix


@dataclass(frozen=True, eq=False)
class StreamedSample:
    """A labelled sample read chunk by chunk; the counterpart of :class:`veil.samples.sources.LabelledSample`.

    ``rows`` counts every row of the files; ``dropped_rows`` of them lack a
    label and are skipped by the fit (only when dropping was asked for: a
    sample with missing labels is refused otherwise).  For several attributes
    (``attribute_table``) the labels are read, checked and tabled once, here,
    and each partition carries its rows of the table.
    """

    rows: int
    dim: int
    dtype: np.dtype[Any]
    attribute_key: str
    task_key: str | None
    files: dict[str, str]
    _partitions: Any = field(repr=False)
    dropped_rows: int = 0
    attribute_table: bool = False
    notes: tuple[str, ...] = ()
    #: The dtype of the attribute table (None: one label column).
    attribute_dtype: np.dtype[Any] | None = None
    #: The context columns the attribute is guarded within, each on its own (empty: the population only).
    context_keys: tuple[str, ...] = ()
    #: Streamed files (``.npy``, Parquet, shards) state no embedding model.
    embedding_model: EmbeddingModel | None = None

    @property
    def labelled_rows(self) -> int:
        """Rows with every label present."""
        return self.rows - self.dropped_rows

    def partitions(self, chunk_rows: int = STREAM_CHUNK_ROWS) -> list[NpyPartition] | list[ParquetPartition]:
        """The sample cut into self-contained pieces a worker process can load on its own, in row order."""
        parts: list[NpyPartition] | list[ParquetPartition] = self._partitions(chunk_rows)
        return parts

    @property
    def fingerprint(self) -> str:
        return fingerprint_of(self.files)


@dataclass(frozen=True)
class NpyFile:
    """A 2-D ``.npy`` read by explicit reads, chunk by chunk.

    Not memory-mapped: pages of a mapped file that a pass has touched stay in
    the process's resident set for as long as the kernel caches them, so a
    6 GB pass would show 6 GB resident.  Reads into a fresh chunk keep it to
    one chunk.
    """

    path: Path
    dtype: np.dtype[Any]
    shape: tuple[int, int]
    offset: int

    @classmethod
    def open(cls, path: Path) -> NpyFile:
        try:
            with path.open("rb") as handle:
                version = np.lib.format.read_magic(handle)
                read_header = (
                    np.lib.format.read_array_header_1_0 if version == (1, 0) else np.lib.format.read_array_header_2_0
                )
                shape, fortran, dtype = read_header(handle)
                offset = handle.tell()
        except (ValueError, OSError, EOFError) as error:
            raise DataError(f"{path} is not a readable .npy array ({error})") from None
        if dtype.hasobject:
            raise DataError(f"{path} holds Python objects; it would need pickle, which veil never uses")
        if dtype.kind not in "fiu":
            raise DataError(f"{path}: embeddings must be numbers, got dtype {dtype}")
        if fortran:
            raise DataError(f"{path} is stored in Fortran order; save it in C order to stream it by rows")
        if len(shape) != 2 or 0 in shape:
            raise DataError(f"{path}: embeddings must be a non-empty 2-D array, got shape {shape}")
        expected = offset + shape[0] * shape[1] * dtype.itemsize
        if path.stat().st_size < expected:
            raise DataError(f"{path} is truncated: {path.stat().st_size} bytes, the header promises {expected}")
        return cls(path=path, dtype=dtype, shape=(int(shape[0]), int(shape[1])), offset=offset)

    def read(self, start: int, rows: int) -> NDArray[Any]:
        count = min(rows, self.shape[0] - start)
        with self.path.open("rb") as handle:
            handle.seek(self.offset + start * self.shape[1] * self.dtype.itemsize)
            block: NDArray[Any] = np.fromfile(handle, dtype=self.dtype, count=count * self.shape[1])
        return block.reshape(count, self.shape[1])


def _memmap_labels(path: Path) -> NDArray[Any]:
    try:
        values: NDArray[Any] = np.load(path, mmap_mode="r", allow_pickle=False)
    except (ValueError, OSError, EOFError) as error:
        raise DataError(f"{path} is not a readable .npy array without pickle ({error})") from None
    return values


def _label_columns(labels: Path, keys: list[str], rows: int) -> dict[str, NDArray[Any]]:
    if not labels.is_file():
        raise DataError(f"{labels} does not exist")
    if labels.suffix.lower() == ".csv":
        columns = csv_columns(labels, keys)
    elif labels.suffix.lower() == ".npy":
        if len(keys) > 1:
            raise DataError(f"{labels} holds one label array; put attribute, task and context in a .csv to use them")
        columns = {keys[0]: _memmap_labels(labels)}
    else:
        raise DataError(f"labels must be a .npy or .csv file, not {labels.name}")
    for key, values in columns.items():
        if values.ndim != 1 or values.shape[0] != rows:
            raise DataError(f"{labels}: labels {key!r} have shape {values.shape} but the embeddings have {rows} rows")
    return columns


@dataclass(frozen=True, eq=False)
class NpyPartition:
    """Rows ``offset .. offset + rows - 1`` of one ``.npy`` file, global rows from ``start``, with their labels."""

    file: NpyFile
    offset: int
    rows: int
    start: int
    attribute: NDArray[Any]
    task: NDArray[Any] | None
    #: Labels prepared whole (an attribute table): the rows kept; ``attribute``, ``task`` and ``contexts`` hold
    #: only those.
    kept: NDArray[np.bool_] | None = None
    contexts: Mapping[str, NDArray[Any]] = field(default_factory=dict)

    def load(self) -> Chunk:
        block = check_embeddings(
            self.file.read(self.offset, self.rows), source=f"{self.file.path} rows {self.offset}.."
        )
        if self.kept is not None:
            return _prepared_chunk(self.start, block, self.kept, (self.attribute, self.task, self.contexts))
        missing = missing_labels(self.attribute)
        for values in (self.task, *self.contexts.values()):
            if values is not None:
                missing |= missing_labels(values)
        return Chunk.of_rows(self.start, block, self.attribute, self.task, missing, self.contexts)

    @property
    def stop(self) -> int:
        return self.start + self.rows


#: The kept rows' attribute (or table), task and context labels (by column), prepared whole.
PreparedLabels = tuple[NDArray[Any], NDArray[Any] | None, Mapping[str, NDArray[Any]]]


def _prepared_chunk(start: int, block: NDArray[np.floating], kept: NDArray[np.bool_], labels: PreparedLabels) -> Chunk:
    index = np.arange(start, start + block.shape[0], dtype=np.int64)[kept]
    attribute, task, contexts = labels
    return Chunk(index=index, embeddings=block[kept], attribute=attribute, task=task, contexts=contexts)


class _Prepared:
    """Labels read whole (see :func:`veil.samples.sources.labels_of`), handed out by ranges of the files' rows."""

    def __init__(self, read: ReadLabels, rows: int) -> None:
        self.read = read
        self.kept = np.ones(rows, dtype=bool) if read.kept is None else read.kept
        # Kept rows before each row of the files: where a range's rows start in the kept labels.
        self.before = np.concatenate([[0], np.cumsum(self.kept)])

    def rows(self, start: int, stop: int) -> tuple[NDArray[np.bool_], PreparedLabels]:
        first, last = int(self.before[start]), int(self.before[stop])
        task = None if self.read.task is None else self.read.task[first:last]
        contexts = {key: values[first:last] for key, values in self.read.contexts.items()}
        return self.kept[start:stop], (self.read.attribute[first:last], task, contexts)


def _array_partitions(
    parts: list[NpyFile],
    columns: dict[str, NDArray[Any]],
    attribute: str,
    task: str | None,
    prepared: _Prepared | None = None,
    given: tuple[str, ...] = (),
) -> Any:
    def partitions(chunk_rows: int) -> list[NpyPartition]:
        found, start = [], 0
        for part in parts:
            for offset in range(0, part.shape[0], chunk_rows):
                rows = min(chunk_rows, part.shape[0] - offset)
                if prepared is not None:
                    kept, (labels, tasks, contexts) = prepared.rows(start, start + rows)
                    found.append(NpyPartition(part, offset, rows, start, labels, tasks, kept, contexts))
                else:
                    found.append(
                        NpyPartition(
                            file=part,
                            offset=offset,
                            rows=rows,
                            start=start,
                            attribute=np.array(columns[attribute][start : start + rows]),
                            task=None if task is None else np.array(columns[task][start : start + rows]),
                            contexts={key: np.array(columns[key][start : start + rows]) for key in given},
                        )
                    )
                start += rows
        return found

    return partitions


@dataclass(frozen=True, eq=False)
class ParquetPartition:
    """One row group of a Parquet file, global rows from ``start``."""

    path: Path
    group: int
    start: int
    stop: int
    embeddings_key: str
    attribute_key: str
    task_key: str | None
    dim: int
    #: Labels prepared whole (an attribute table): the rows kept, and their attribute table, task and context.
    prepared: tuple[NDArray[np.bool_], PreparedLabels] | None = None
    context_keys: tuple[str, ...] = ()

    def load(self) -> Chunk:
        import pyarrow.parquet as pq

        keys = [self.embeddings_key]
        if self.prepared is None:
            tasks = [] if self.task_key is None else [self.task_key]
            keys += list(dict.fromkeys([self.attribute_key, *tasks, *self.context_keys]))
        table = pq.ParquetFile(self.path).read_row_group(self.group, columns=keys)
        matrix = embedding_matrix(table.column(self.embeddings_key), name=self.embeddings_key, first_row=self.start)
        if matrix.shape[1] != self.dim:
            raise DataError(f"{self.path}: column {self.embeddings_key!r} mixes dimensions from row {self.start}")
        if self.prepared is not None:
            kept, labels = self.prepared
            block = check_embeddings(matrix, source=f"{self.path} rows {self.start}..")
            return _prepared_chunk(self.start, block, kept, labels)
        source = str(self.path)
        attribute, missing = arrow_labels(table.column(self.attribute_key), key=self.attribute_key, source=source)
        task = None
        if self.task_key is not None:
            task, task_missing = arrow_labels(table.column(self.task_key), key=self.task_key, source=source)
            missing = missing | task_missing
        contexts: dict[str, NDArray[Any]] = {}
        for key in self.context_keys:
            contexts[key], absent = arrow_labels(table.column(key), key=key, source=source)
            missing = missing | absent
        return Chunk.of_rows(
            self.start,
            check_embeddings(matrix, source=f"{self.path} rows {self.start}.."),
            attribute,
            task,
            missing,
            contexts,
        )


def _parquet_partitions(
    path: Path,
    embeddings_key: str,
    attribute: str,
    task: str | None,
    prepared: _Prepared | None = None,
    given: tuple[str, ...] = (),
) -> tuple[Any, int, int, Any]:
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        parquet = pq.ParquetFile(path)
    except (pa.ArrowInvalid, OSError) as error:
        raise DataError(f"{path} is not a readable Parquet file ({error})") from None
    keys = [embeddings_key, attribute] + ([] if task is None else [task]) + list(given)
    for key in keys:
        if key not in parquet.schema_arrow.names:
            raise DataError(f"{path} has no column {key!r}; its columns are {', '.join(parquet.schema_arrow.names)}")
    rows = parquet.metadata.num_rows
    if rows == 0:
        raise DataError(f"{path} has no rows")
    first = embedding_matrix(parquet.read_row_group(0, columns=[embeddings_key]).column(0), name=embeddings_key)
    starts = np.concatenate(
        [[0], np.cumsum([parquet.metadata.row_group(g).num_rows for g in range(parquet.num_row_groups)])]
    )

    def partitions(chunk_rows: int) -> list[ParquetPartition]:
        # A row group is the unit Parquet reads; write files with row groups of a chunk's size or less.
        return [
            ParquetPartition(
                path, group, int(starts[group]), int(starts[group + 1]), embeddings_key, attribute, task,
                first.shape[1], None if prepared is None else prepared.rows(int(starts[group]), int(starts[group + 1])),
                context_keys=given,
            )
            for group in range(parquet.num_row_groups)
        ]  # fmt: skip

    return partitions, rows, first.shape[1], first.dtype


def _prepare(
    spec: AttributeSpec,
    found: dict[str, NDArray[Any]],
    absent: dict[str, NDArray[np.bool_]],
    task: str | None,
    source: str | Path,
    rows: int,
    drop: bool,
    given: tuple[str, ...],
) -> _Prepared:
    """The labels of every row, refused or dropped where missing, merged and tabled (see ``labels_of``)."""
    return _Prepared(labels_of(spec, found, absent, task, source=str(source), drop=drop, given=given), rows)


def _dropped(kept: NDArray[np.bool_] | None) -> int:
    return 0 if kept is None else int(np.count_nonzero(~kept))


def open_stream(
    path: str | Path,
    *,
    attribute: str | Sequence[str],
    task: str | None = None,
    embeddings_key: str = "embedding",
    labels: str | Path | None = None,
    drop_missing: bool = False,
    continuous: Sequence[str] = (),
    joint: bool = False,
    merge_classes: Sequence[str] = (),
    incomplete: bool = False,
    given: str | Sequence[str] | None = None,
) -> StreamedSample:
    """Describe a large labelled sample without reading its embeddings (every file is hashed, in one pass each).

    The labels are read whole here (a few bytes a row), so that missing ones
    are refused, or counted for dropping, before the long pass starts.  The
    options are :func:`veil.samples.sources.load_labelled_sample`'s; the context
    columns (``given``) travel with each partition like the task labels.

    Raises
    ------
    DataError
        A missing or unreadable file, shards of different dimensions, labels
        of the wrong length, a missing label (unless ``drop_missing``).
    """
    names = [attribute] if isinstance(attribute, str) else list(attribute)
    merges = tuple(parse_merge(text) for text in merge_classes)
    spec = AttributeSpec(
        names=tuple(names), continuous=tuple(continuous), joint=joint, merges=merges, incomplete=incomplete
    )
    contexts = context_keys_of(given, spec)
    # Several attributes (or merged classes): the labels are read, checked and tabled once, before the pass.
    whole = spec.is_table or bool(merges)
    attribute = names[0]
    source = Path(path)
    if not source.exists():
        raise DataError(f"{source} does not exist")
    keys = label_keys(spec, task, contexts)
    roles = [("attribute", attribute)] + ([] if task is None else [("task", task)])
    roles += [("context", key) for key in contexts]
    if source.is_dir() or source.suffix.lower() == ".npy":
        shards = sorted(source.glob("*.npy")) if source.is_dir() else [source]
        if not shards:
            raise DataError(f"{source} holds no .npy shards")
        if labels is None:
            raise DataError(f"{source} holds embeddings only; give the labels file (.npy or .csv) too")
        parts = [NpyFile.open(shard) for shard in shards]
        dims = {part.shape[1] for part in parts}
        if len(dims) > 1:
            raise DataError(f"{source}: the shards have different dimensions ({sorted(dims)})")
        rows = sum(part.shape[0] for part in parts)
        columns = _label_columns(Path(labels), keys, rows)
        files = {str(shard): file_sha256(shard) for shard in shards}
        files[str(labels)] = file_sha256(Path(labels))
        dtypes = {part.dtype for part in parts}
        dtype = np.dtype(np.float32) if dtypes == {np.dtype(np.float32)} else np.dtype(np.float64)
        if whole:
            found = {key: np.asarray(values) for key, values in columns.items()}
            absent = {key: missing_labels(values) for key, values in found.items()}
            tabled = _prepare(spec, found, absent, task, labels, rows, drop_missing, contexts)
            return StreamedSample(
                rows=rows, dim=dims.pop(), dtype=dtype, attribute_key=spec.key, task_key=task, files=files,
                _partitions=_array_partitions(parts, columns, attribute, task, tabled),
                dropped_rows=_dropped(tabled.read.kept), attribute_table=spec.is_table, notes=tabled.read.notes,
                attribute_dtype=tabled.read.attribute.dtype, context_keys=contexts,
            )  # fmt: skip
        kept = rows_to_keep(
            [(role, key, missing_labels(np.asarray(columns[key]))) for role, key in roles],
            source=str(labels),
            drop=drop_missing,
        )
        return StreamedSample(
            rows=rows, dim=dims.pop(), dtype=dtype, attribute_key=attribute, task_key=task, files=files,
            _partitions=_array_partitions(parts, columns, attribute, task, given=contexts), dropped_rows=_dropped(kept),
            context_keys=contexts,
        )  # fmt: skip
    if source.suffix.lower() in PARQUET_SUFFIXES:
        if labels is not None:
            raise DataError("Parquet input carries its labels in columns; --labels goes with .npy input")
        import pyarrow.parquet as pq

        prepared: _Prepared | None = None
        if whole:
            import pyarrow as pa

            try:
                names_in_file = pq.ParquetFile(source).schema_arrow.names
            except (pa.ArrowInvalid, OSError) as error:
                raise DataError(f"{source} is not a readable Parquet file ({error})") from None
            absent_keys = [key for key in keys if key not in names_in_file]
            if absent_keys:
                raise DataError(
                    f"{source} has no column {absent_keys[0]!r}; its columns are {', '.join(names_in_file)}"
                )
            table = pq.read_table(source, columns=list(dict.fromkeys(keys)))
            read = {key: arrow_labels(table.column(key), key=key, source=str(source)) for key in keys}
            found = {key: values for key, (values, _) in read.items()}
            absent = {key: mask for key, (_, mask) in read.items()}
            prepared = _prepare(spec, found, absent, task, source, table.num_rows, drop_missing, contexts)
        partitions, rows, dim, dtype = _parquet_partitions(source, embeddings_key, attribute, task, prepared, contexts)
        if prepared is not None:
            return StreamedSample(
                rows=rows, dim=dim, dtype=np.dtype(dtype), attribute_key=spec.key, task_key=task,
                files={str(source): file_sha256(source)}, _partitions=partitions,
                dropped_rows=_dropped(prepared.read.kept), attribute_table=spec.is_table, notes=prepared.read.notes,
                attribute_dtype=prepared.read.attribute.dtype, context_keys=contexts,
            )  # fmt: skip
        table = pq.read_table(source, columns=list(dict.fromkeys(keys)))
        kept = rows_to_keep(
            [(role, key, arrow_labels(table.column(key), key=key, source=str(source))[1]) for role, key in roles],
            source=str(source),
            drop=drop_missing,
        )
        return StreamedSample(
            rows=rows, dim=dim, dtype=np.dtype(dtype), attribute_key=attribute, task_key=task,
            files={str(source): file_sha256(source)}, _partitions=partitions, dropped_rows=_dropped(kept),
            context_keys=contexts,
        )  # fmt: skip
    raise DataError(f"{source}: streaming reads a .npy file, a folder of .npy shards or Parquet, not {source.suffix}")
