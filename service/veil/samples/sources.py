"""Read a labelled sample for the fitting job: ``.npz``, ``.npy`` with a labels file, or Parquet.

==========  =====================================================================
input       where embeddings and labels come from
==========  =====================================================================
``.npz``    arrays by key: the embeddings key (default ``embedding``), the attribute and task keys
``.npy``    a 2-D array; labels in ``--labels``: a ``.npy`` (the attribute) or a ``.csv`` with a header
Parquet     a list or fixed-size-list column of numbers per row, plus label columns
==========  =====================================================================

Every file read is hashed (sha256) so the version card records exactly which
data fitted it.  Nothing is ever unpickled.
"""

from __future__ import annotations

import csv
import hashlib
import io
import zipfile
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil.defaults import EMBEDDINGS_KEY, STREAM_CHUNK_ROWS
from veil.errors import DataError
from veil.progress import advance, phase
from veil.samples.attributes import attribute_table, is_table
from veil.samples.chunks import Chunk, InMemoryPartition
from veil.samples.embedding_model import EmbeddingModel, sample_model
from veil.samples.labels import arrow_labels, missing_labels, rows_to_keep
from veil.samples.tables import embedding_matrix

DEFAULT_EMBEDDINGS_KEY = EMBEDDINGS_KEY
_HASH_BLOCK = 8 << 20
PARQUET_SUFFIXES = (".parquet", ".pq")


@dataclass(frozen=True, eq=False)
class LabelledSample:
    """Embeddings with their attribute (and optional task) labels, and where they came from.

    Attributes
    ----------
    embeddings : ndarray of shape (n, d), float32 or float64
    attribute : ndarray of shape (n,)
        The labels of one categorical attribute, or, for several attributes
        (or a continuous one), a table made by :func:`veil.maps.attribute.attribute_table`.
    attribute_key : str
        The attribute's key (several: their keys, joined by ", ").
    task : ndarray of shape (n,) or None
    task_key : str or None
    files : dict of str to str
        sha256 of every file read, by path.
    kept : ndarray of shape (n_read,), dtype bool, or None
        Which rows of the files were kept when rows with a missing label
        were dropped (None: every row).  The held-out split hashes a row's
        index in the files, so dropping rows moves no other row across it.
    notes : tuple of str
        What was done to the labels as read (classes merged), for the card.
    contexts : mapping of str to ndarray of shape (n,)
        Each row's value of every context column (a field, a query's category), by column: the attribute is then
        guarded within every value of each too (``veil fit --given``).  Empty without one.
    context_keys : tuple of str
        The context columns, in the order given.
    embedding_model : EmbeddingModel or None
        The model an ``.npz`` states made its vectors (its ``embedding_model`` entry, see
        :mod:`veil.samples.embedding_model`); None when the file states none.
    """

    embeddings: NDArray[np.floating]
    attribute: NDArray[Any]
    attribute_key: str
    task: NDArray[Any] | None
    task_key: str | None
    files: dict[str, str]
    kept: NDArray[np.bool_] | None = None
    notes: tuple[str, ...] = ()
    contexts: Mapping[str, NDArray[Any]] = field(default_factory=dict)
    context_keys: tuple[str, ...] = ()
    embedding_model: EmbeddingModel | None = None

    @property
    def rows(self) -> int:
        return int(self.embeddings.shape[0])

    @property
    def labelled_rows(self) -> int:
        """Rows with every label present: here, every row."""
        return self.rows

    @property
    def attribute_table(self) -> bool:
        """Whether the attribute is a table (several attributes, or a continuous one)."""
        return is_table(self.attribute)

    @property
    def attribute_dtype(self) -> np.dtype[Any] | None:
        return self.attribute.dtype if is_table(self.attribute) else None

    @property
    def dropped_rows(self) -> int:
        """Rows of the files dropped for a missing label."""
        return 0 if self.kept is None else int(np.count_nonzero(~self.kept))

    @property
    def dim(self) -> int:
        return int(self.embeddings.shape[1])

    @property
    def dtype(self) -> np.dtype[Any]:
        return self.embeddings.dtype

    @property
    def fingerprint(self) -> str:
        return fingerprint_of(self.files)

    def partitions(self, chunk_rows: int = STREAM_CHUNK_ROWS) -> list[InMemoryPartition]:
        """The whole sample as one partition: in memory already, it is a stream of one chunk.

        ``chunk_rows`` is accepted for the :class:`~veil.samples.chunks.Sample`
        protocol and does not apply.
        """
        index = np.arange(self.rows, dtype=np.int64) if self.kept is None else np.flatnonzero(self.kept)
        chunk = Chunk(
            index=index, embeddings=self.embeddings, attribute=self.attribute, task=self.task, contexts=self.contexts
        )
        return [InMemoryPartition(chunk=chunk, stop=self.rows + self.dropped_rows)]


def fingerprint_of(files: dict[str, str]) -> str:
    """One sha256 over every file's name and sha256, in path order: the card's fingerprint of the fitting data."""
    joined = "\n".join(f"{Path(path).name} {digest}" for path, digest in sorted(files.items()))
    return hashlib.sha256(joined.encode()).hexdigest()


def file_sha256(path: Path) -> str:
    """sha256 of a file, read in blocks (progress reported for large files)."""
    digest = hashlib.sha256()
    size = path.stat().st_size
    done = 0
    with path.open("rb") as handle:
        for block in iter(lambda: handle.read(_HASH_BLOCK), b""):
            digest.update(block)
            done += len(block)
            if size > 4 * _HASH_BLOCK:
                advance(f"hashing {path.name} (MB)", done >> 20, size >> 20)
    return digest.hexdigest()


def _check_file(path: Path) -> None:
    if not path.exists():
        raise DataError(f"{path} does not exist")
    if not path.is_file():
        raise DataError(f"{path} is not a file")


def check_embeddings(matrix: NDArray[Any], *, source: str) -> NDArray[np.floating]:
    """A 2-D matrix of finite numbers (float32 kept, other numbers as float64); refuses anything else."""
    if matrix.dtype.kind not in "fiu":
        raise DataError(f"{source}: embeddings must be numbers, got dtype {matrix.dtype}")
    if matrix.ndim != 2:
        raise DataError(f"{source}: embeddings must be a 2-D array (rows × dimensions), got shape {matrix.shape}")
    if matrix.shape[0] == 0 or matrix.shape[1] == 0:
        raise DataError(f"{source}: embeddings are empty (shape {matrix.shape})")
    out = matrix if matrix.dtype in (np.float32, np.float64) else matrix.astype(np.float64)
    if not np.isfinite(out).all():
        row = int(np.flatnonzero(~np.isfinite(out).all(axis=1))[0])
        raise DataError(f"{source}: embeddings hold NaN or infinite values (first at row {row})")
    return out


def _labels(values: NDArray[Any], *, key: str, rows: int, source: str) -> NDArray[Any]:
    if values.ndim != 1:
        raise DataError(f"{source}: labels {key!r} must be one value per row, got shape {values.shape}")
    if values.shape[0] != rows:
        raise DataError(f"{source}: labels {key!r} have {values.shape[0]} rows but the embeddings have {rows}")
    if values.dtype.kind == "O":
        raise DataError(f"{source}: labels {key!r} must be numbers or strings")
    if values.dtype.kind == "f" and np.isinf(values).any():
        raise DataError(f"{source}: labels {key!r} hold infinite values")
    return values


def _npz_arrays(path: Path, keys: list[str]) -> dict[str, NDArray[Any]]:
    if not zipfile.is_zipfile(path):
        raise DataError(f"{path} is not a readable .npz file (not a zip archive)")
    try:
        with np.load(path, allow_pickle=False) as stored:
            missing = [key for key in keys if key not in stored.files]
            if missing:
                raise DataError(f"{path} has no array {missing[0]!r}; it holds {', '.join(sorted(stored.files))}")
            return {key: stored[key] for key in keys}
    except DataError:
        raise
    except ValueError as error:
        raise DataError(f"{path}: cannot read an array without unpickling it ({error})") from None
    except (OSError, EOFError) as error:
        raise DataError(f"{path} is not a readable .npz file ({error})") from None


def _npy_array(path: Path) -> NDArray[Any]:
    try:
        array: NDArray[Any] = np.load(path, mmap_mode="r", allow_pickle=False)
    except ValueError as error:
        raise DataError(f"{path}: cannot read the array without unpickling it ({error})") from None
    except (OSError, EOFError) as error:
        raise DataError(f"{path} is not a readable .npy file ({error})") from None
    return array


def csv_columns(path: Path, keys: list[str]) -> dict[str, NDArray[Any]]:
    try:
        text = path.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise DataError(f"{path} is not UTF-8 text") from None
    reader = csv.DictReader(io.StringIO(text))
    header = reader.fieldnames or []
    missing = [key for key in keys if key not in header]
    if missing:
        raise DataError(f"{path} has no column {missing[0]!r}; its header is {', '.join(header) or '(empty)'}")
    rows = list(reader)
    return {key: np.array([row[key] for row in rows], dtype=str) for key in keys}


def _parquet_arrays(
    path: Path, embeddings_key: str, keys: list[str]
) -> tuple[NDArray[Any], dict[str, NDArray[Any]], dict[str, NDArray[np.bool_]]]:
    """The embeddings, the label columns (nulls filled in) and the masks of their missing labels."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        parquet = pq.ParquetFile(path)
    except (pa.ArrowInvalid, OSError) as error:
        raise DataError(f"{path} is not a readable Parquet file ({error})") from None
    names = parquet.schema_arrow.names
    for key in [embeddings_key, *keys]:
        if key not in names:
            raise DataError(f"{path} has no column {key!r}; its columns are {', '.join(names)}")
    blocks: list[NDArray[Any]] = []
    labels: dict[str, list[NDArray[Any]]] = {key: [] for key in keys}
    missing: dict[str, list[NDArray[np.bool_]]] = {key: [] for key in keys}
    first_row = 0
    for group in range(parquet.num_row_groups):
        table = parquet.read_row_group(group, columns=[embeddings_key, *keys])
        blocks.append(embedding_matrix(table.column(embeddings_key), name=embeddings_key, first_row=first_row))
        if blocks[-1].shape[1] != blocks[0].shape[1]:
            raise DataError(
                f"{path}: column {embeddings_key!r} mixes dimensions: {blocks[0].shape[1]} in the first row group, "
                f"{blocks[-1].shape[1]} from row {first_row}"
            )
        for key in keys:
            values, absent = arrow_labels(table.column(key), key=key, source=str(path))
            labels[key].append(values)
            missing[key].append(absent)
        first_row += table.num_rows
        advance(f"reading {path.name} (row groups)", group + 1, parquet.num_row_groups)
    if not blocks:
        raise DataError(f"{path} has no rows")
    return (
        np.concatenate(blocks),
        {key: np.concatenate(parts) for key, parts in labels.items()},
        {key: np.concatenate(parts) for key, parts in missing.items()},
    )


def load_labelled_sample(
    path: str | Path,
    *,
    attribute: str | Sequence[str],
    task: str | None = None,
    embeddings_key: str = DEFAULT_EMBEDDINGS_KEY,
    labels: str | Path | None = None,
    drop_missing: bool = False,
    continuous: Sequence[str] = (),
    joint: bool = False,
    merge_classes: Sequence[str] = (),
    incomplete: bool = False,
    given: str | Sequence[str] | None = None,
) -> LabelledSample:
    """Read embeddings and labels for a fit.

    Parameters
    ----------
    path : path
        ``.npz``, ``.npy`` or Parquet (``.parquet``/``.pq``).
    attribute : str or sequence of str
        Key or column of the protected attribute, or of each of several.
    task : str, optional
        Key or column of a task label, for utility figures.
    embeddings_key : str, default="embedding"
        Key (``.npz``) or column (Parquet) of the embeddings.
    labels : path, optional
        For ``.npy`` input: a ``.npy`` holding the attribute, or a ``.csv``
        with a header naming the attribute (and task) columns.
    drop_missing : bool, default=False
        Drop the rows whose attribute, task or context label is missing (see
        :mod:`veil.samples.labels`) instead of refusing the sample.
    continuous : sequence of str
        The attributes that are continuous (age in years, a score); the others are categorical.
    joint : bool, default=False
        Also guard the intersection of the categorical attributes (their joint classes).
    merge_classes : sequence of str
        Rare classes to merge, each ``ATTRIBUTE:CLASS,CLASS=NEW`` (the classes named become class ``NEW``).
    incomplete : bool, default=False
        Several attributes: keep the rows that lack some of them (not all);
        each attribute's statistics then come from the rows that carry it.
    given : str or sequence of str, optional
        Key or column of a categorical context (a field, a query's category) to guard the attribute within,
        or of each of several (each guarded on its own, see :mod:`veil.maps.given`); a missing value is
        refused, or its row dropped, like a missing label.

    Raises
    ------
    DataError
        With a message naming the file and the problem (a missing label:
        its column, how many, and the first row).
    """
    names = [attribute] if isinstance(attribute, str) else list(attribute)
    merges = tuple(parse_merge(text) for text in merge_classes)
    spec = AttributeSpec(
        names=tuple(names), continuous=tuple(continuous), joint=joint, merges=merges, incomplete=incomplete
    )
    keys = context_keys_of(given, spec)
    with phase(f"reading {Path(path).name}"):
        return _read_sample(Path(path), spec, task, embeddings_key, labels, drop_missing, keys)


def context_keys_of(given: str | Sequence[str] | None, spec: AttributeSpec) -> tuple[str, ...]:
    """The context columns as a tuple; refuses one named twice or one that is an attribute it would guard."""
    keys = () if given is None else (given,) if isinstance(given, str) else tuple(given)
    for position, key in enumerate(keys):
        if key in spec.names:
            raise DataError(f"the context {key!r} is an attribute of this fit; guard within another column")
        if key in keys[:position]:
            raise DataError(f"the context {key!r} is given twice; give each context column once")
    return keys


def label_keys(spec: AttributeSpec, task: str | None, given: Sequence[str] = ()) -> list[str]:
    """Every label column a fit reads, each once: the attributes, the task and the contexts."""
    return list(dict.fromkeys([*spec.names, *([] if task is None else [task]), *given]))


@dataclass(frozen=True)
class AttributeSpec:
    """The attributes a fit guards: their keys, which are continuous, and whether their intersection is guarded."""

    names: tuple[str, ...]
    continuous: tuple[str, ...] = ()
    joint: bool = False
    #: ``(attribute, classes, new class)`` of each merge of rare classes.
    merges: tuple[tuple[str, tuple[str, ...], str], ...] = ()
    #: Keep rows that lack some attributes: each attribute's statistics come from the rows that carry it.
    incomplete: bool = False

    def __post_init__(self) -> None:
        if not self.names:
            raise DataError("name at least one attribute")
        repeated = sorted({name for name in self.names if self.names.count(name) > 1})
        if repeated:
            raise DataError(f"attribute {repeated[0]!r} is named twice")
        unknown = [name for name in self.continuous if name not in self.names]
        if unknown:
            raise DataError(f"--continuous {unknown[0]} names no attribute; the attributes are {', '.join(self.names)}")
        if self.joint and len(self.names) - len(set(self.continuous)) < 2:
            raise DataError("the intersection (--joint) needs at least two categorical attributes")
        if self.incomplete and len(self.names) < 2:
            raise DataError(
                "incomplete labels (--incomplete-labels) need several attributes; a row lacking the one "
                "attribute carries nothing to guard (drop it with --drop-missing)"
            )
        for attribute, _, _ in self.merges:
            if attribute not in self.names or attribute in self.continuous:
                raise DataError(
                    f"--merge-classes names {attribute!r}, which is not a categorical attribute of this fit"
                )

    def merged(
        self,
        columns: dict[str, NDArray[Any]],
        *,
        source: str,
        missing: dict[str, NDArray[np.bool_]] | None = None,
    ) -> tuple[dict[str, NDArray[Any]], list[str]]:
        """The label columns with the rare classes merged as asked, and a note on each merge for the card."""
        out = dict(columns)
        notes = []
        for attribute, classes, new in self.merges:
            text = out[attribute].astype(str)
            carried = np.ones(text.shape, bool) if missing is None else ~missing[attribute]
            unknown = [name for name in classes if not np.any((text == name) & carried)]
            if unknown:
                raise DataError(f"{source}: --merge-classes: {attribute!r} has no class {unknown[0]!r}")
            merging = np.isin(text, classes) & carried
            out[attribute] = np.where(merging, new, text)
            notes.append(
                f"classes {', '.join(classes)} of {attribute!r} were merged into {new!r} ({int(merging.sum())} rows; "
                "--merge-classes)"
            )
        return out, notes

    @property
    def is_table(self) -> bool:
        """Anything but one categorical attribute travels as an attribute table."""
        return len(self.names) > 1 or bool(self.continuous)

    @property
    def key(self) -> str:
        return ", ".join(self.names)

    def table(
        self, columns: dict[str, NDArray[Any]], *, source: str, missing: dict[str, NDArray[np.bool_]] | None = None
    ) -> NDArray[Any]:
        """The attribute column (one categorical attribute) or table (any other case) of the labels read.

        ``missing`` marks, for incomplete labels, the rows that lack each attribute.
        """
        if not self.is_table:
            return columns[self.names[0]]
        values: dict[str, NDArray[Any]] = {}
        for name in self.names:
            column = columns[name]
            if missing is not None and name in self.continuous and column.dtype.kind in "US":
                column = np.where(missing[name], "0", column)
            if name in self.continuous and column.dtype.kind in "US":
                try:
                    column = column.astype(np.float64)
                except ValueError:
                    raise DataError(
                        f"{source}: continuous attribute {name!r} holds text that is not a number"
                    ) from None
            values[name] = column
        try:
            return attribute_table(values, continuous=self.continuous, joint=self.joint, missing=missing)
        except ValueError as error:
            raise DataError(f"{source}: {error}") from None


def parse_merge(text: str) -> tuple[str, tuple[str, ...], str]:
    """``ATTRIBUTE:CLASS,CLASS=NEW`` as ``(attribute, classes, new class)``; refuses anything else in one line."""
    attribute, colon, rest = text.partition(":")
    listed, equals, new = rest.rpartition("=")
    classes = tuple(name.strip() for name in listed.split(",") if name.strip())
    if not colon or not equals or not attribute.strip() or not classes or not new.strip():
        raise DataError(f"--merge-classes {text!r} does not read as ATTRIBUTE:CLASS,CLASS=NEW (e.g. gender:x,y=other)")
    return attribute.strip(), classes, new.strip()


def _read_sample(
    data_path: Path,
    spec: AttributeSpec,
    task: str | None,
    embeddings_key: str,
    labels: str | Path | None,
    drop_missing: bool,
    given: tuple[str, ...],
) -> LabelledSample:
    _check_file(data_path)
    keys = label_keys(spec, task, given)
    files = {str(data_path): file_sha256(data_path)}
    suffix = data_path.suffix.lower()
    absent: dict[str, NDArray[np.bool_]] | None = None
    label_source = data_path
    if labels is not None and suffix != ".npy":
        raise DataError(f"a separate labels file goes with .npy embeddings, not with {suffix} input")
    if suffix == ".npz":
        arrays = _npz_arrays(data_path, [embeddings_key, *keys])
        matrix, columns = arrays.pop(embeddings_key), arrays
    elif suffix == ".npy":
        if labels is None:
            raise DataError(f"{data_path} holds embeddings only; give the labels file (.npy or .csv) too")
        labels_path = label_source = Path(labels)
        _check_file(labels_path)
        files[str(labels_path)] = file_sha256(labels_path)
        matrix = _npy_array(data_path)
        if labels_path.suffix.lower() == ".csv":
            columns = csv_columns(labels_path, keys)
        elif labels_path.suffix.lower() == ".npy":
            if len(keys) > 1:
                raise DataError(f"{labels_path} holds one label array; put several labels in a .csv to use them")
            columns = {spec.names[0]: np.asarray(_npy_array(labels_path))}
        else:
            raise DataError(f"labels must be a .npy or .csv file, not {labels_path.name}")
    elif suffix in PARQUET_SUFFIXES:
        matrix, columns, absent = _parquet_arrays(data_path, embeddings_key, keys)
    else:
        raise DataError(f"{data_path}: unsupported input {suffix or '(no suffix)'}; use .npz, .npy or .parquet")
    embeddings = check_embeddings(np.asarray(matrix), source=str(data_path))
    rows = embeddings.shape[0]
    found = {key: _labels(np.asarray(columns[key]), key=key, rows=rows, source=str(data_path)) for key in keys}
    if absent is None:
        absent = {key: missing_labels(values) for key, values in found.items()}
    read = labels_of(spec, found, absent, task, source=str(label_source), drop=drop_missing, given=given)
    return LabelledSample(
        embeddings=embeddings if read.kept is None else embeddings[read.kept],
        notes=read.notes,
        attribute=read.attribute,
        attribute_key=spec.key,
        task=read.task,
        task_key=task,
        files=files,
        kept=read.kept,
        contexts=read.contexts,
        context_keys=given,
        embedding_model=sample_model(data_path),
    )


@dataclass(frozen=True, eq=False)
class ReadLabels:
    """The labels of a sample as a fit uses them: the rows kept, and their attribute (or table), task and contexts."""

    kept: NDArray[np.bool_] | None
    attribute: NDArray[Any]
    task: NDArray[Any] | None
    notes: tuple[str, ...]
    contexts: Mapping[str, NDArray[Any]] = field(default_factory=dict)


def labels_of(
    spec: AttributeSpec,
    found: dict[str, NDArray[Any]],
    absent: dict[str, NDArray[np.bool_]],
    task: str | None,
    *,
    source: str,
    drop: bool,
    given: Sequence[str] = (),
) -> ReadLabels:
    """Refuse or drop the rows whose labels are missing, merge classes, and build the attribute (or its table).

    ``found`` holds every label column read (attributes, task and context) and ``absent``
    the masks of their missing labels, over every row of the files.  A missing context value is refused or
    dropped as a missing label is.
    """
    checked = [("attribute", name, absent[name]) for name in spec.names]
    if spec.incomplete:
        # A row may lack some attributes; one that lacks every one carries nothing to guard.
        checked = [("attribute", f"every attribute ({spec.key})", np.logical_and.reduce([m for _, _, m in checked]))]
    checked += [] if task is None else [("task", task, absent[task])]
    checked += [("context", key, absent[key]) for key in given]
    kept = rows_to_keep(checked, source=source, drop=drop)
    if kept is not None:
        found = {key: values[kept] for key, values in found.items()}
        absent = {key: values[kept] for key, values in absent.items()}
    found, notes = spec.merged(found, source=source, missing=absent if spec.incomplete else None)
    return ReadLabels(
        kept=kept,
        attribute=spec.table(found, source=source, missing=absent if spec.incomplete else None),
        task=None if task is None else found[task],
        notes=tuple(notes),
        contexts={key: found[key] for key in given},
    )
