"""Clean a whole corpus offline with a stored version, for re-indexing a vector store.

The output has the input's format (``.npy`` in, ``.npy`` out; Parquet in,
Parquet out with every other column kept), or is a faiss inner-product index
(``.npy`` in, ``.faiss`` out, with the ``faiss`` extra); it is written under a temporary name
and renamed into place when complete, and gets a manifest beside it
(``OUT.manifest.json``) naming the version and the checksums of input and
output, so an index records exactly which eraser cleaned it.  Memory stays
bounded by the chunk size, whatever the corpus size.
"""

from __future__ import annotations

import json
import os
import tempfile
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil.cleaning.index import DEFAULT_FACTORY, INDEX_SUFFIX, inner_product_index, write_index
from veil.defaults import APPLY_CHUNK_ROWS
from veil.errors import DataError
from veil.progress import advance
from veil.registry import StoredVersion, current_user
from veil.samples.sources import DEFAULT_EMBEDDINGS_KEY, PARQUET_SUFFIXES, file_sha256
from veil.samples.streaming import NpyFile
from veil.samples.tables import embedding_column, embedding_matrix

DEFAULT_CHUNK_ROWS = APPLY_CHUNK_ROWS
MANIFEST_SUFFIX = ".manifest.json"


def manifest_path(output: Path) -> Path:
    return output.with_name(output.name + MANIFEST_SUFFIX)


def _clean_chunk(version: StoredVersion, chunk: NDArray[Any], *, first_row: int, source: Path) -> NDArray[np.floating]:
    if chunk.dtype.kind not in "fiu":
        raise DataError(f"{source}: embeddings must be numbers, got dtype {chunk.dtype}")
    values = chunk if chunk.dtype in (np.float32, np.float64) else chunk.astype(np.float32)
    finite = np.isfinite(values).all(axis=1)
    if not finite.all():
        raise DataError(f"{source}: row {first_row + int(np.flatnonzero(~finite)[0])} holds NaN or infinite values")
    return version.artifact.apply(values)


def _check_dim(version: StoredVersion, dim: int, source: Path) -> None:
    expected = version.artifact.map.dim
    if dim != expected:
        raise DataError(f"{source} has {dim}-dimensional embeddings but {version.name} {version.id} expects {expected}")


def _temporary_beside(target: Path) -> Path:
    descriptor, name = tempfile.mkstemp(dir=target.parent, prefix=f".{target.name}.", suffix=".partial")
    os.close(descriptor)
    return Path(name)


def _apply_npy(version: StoredVersion, source: Path, temporary: Path, chunk_rows: int) -> tuple[int, str]:
    # Explicit reads and writes, not memory maps: a mapped file's touched pages count as resident while cached.
    data = NpyFile.open(source)
    rows, dim = data.shape
    _check_dim(version, dim, source)
    out_dtype = data.dtype if data.dtype in (np.float32, np.float64) else np.dtype(np.float32)
    with temporary.open("wb") as handle:
        header = {"descr": np.lib.format.dtype_to_descr(out_dtype), "fortran_order": False, "shape": (rows, dim)}
        np.lib.format.write_array_header_1_0(handle, header)
        for start in range(0, rows, chunk_rows):
            cleaned = _clean_chunk(version, data.read(start, chunk_rows), first_row=start, source=source)
            np.ascontiguousarray(cleaned, dtype=out_dtype).tofile(handle)
            advance("cleaning (rows)", min(start + chunk_rows, rows), rows)
    return rows, str(out_dtype)


def _apply_index(
    version: StoredVersion, source: Path, temporary: Path, chunk_rows: int, factory: str
) -> tuple[int, str]:
    data = NpyFile.open(source)
    rows, dim = data.shape
    _check_dim(version, dim, source)
    index = inner_product_index(dim, factory)
    for start in range(0, rows, chunk_rows):
        cleaned = _clean_chunk(version, data.read(start, chunk_rows), first_row=start, source=source)
        index.add(np.ascontiguousarray(cleaned, dtype=np.float32))
        advance("indexing (rows)", min(start + chunk_rows, rows), rows)
    write_index(index, temporary)
    return rows, f"faiss {factory} index, inner product, float32"


def _apply_parquet(
    version: StoredVersion, source: Path, temporary: Path, chunk_rows: int, column: str
) -> tuple[int, str]:
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        parquet = pq.ParquetFile(source)
    except (pa.ArrowInvalid, OSError) as error:
        raise DataError(f"{source} is not a readable Parquet file ({error})") from None
    schema = parquet.schema_arrow
    if column not in schema.names:
        raise DataError(f"{source} has no column {column!r}; its columns are {', '.join(schema.names)}")
    index = schema.get_field_index(column)
    total, done, dtype = parquet.metadata.num_rows, 0, ""
    writer: pq.ParquetWriter | None = None
    try:
        for batch in parquet.iter_batches(batch_size=chunk_rows):
            matrix = embedding_matrix(batch.column(index), name=column, first_row=done)
            _check_dim(version, matrix.shape[1], source)
            cleaned = _clean_chunk(version, matrix, first_row=done, source=source)
            dtype = str(cleaned.dtype)
            replaced = embedding_column(cleaned, like=schema.field(index).type)
            arrays = [replaced if i == index else batch.column(i) for i in range(batch.num_columns)]
            out_schema = schema.set(index, pa.field(column, replaced.type, nullable=schema.field(index).nullable))
            table = pa.Table.from_arrays(arrays, schema=out_schema)
            if writer is None:
                writer = pq.ParquetWriter(temporary, out_schema)
            writer.write_table(table)
            done += batch.num_rows
            advance("cleaning (rows)", done, total)
    finally:
        if writer is not None:
            writer.close()
    if writer is None:
        raise DataError(f"{source} has no rows")
    return done, dtype


def apply_to_file(
    version: StoredVersion,
    source: str | Path,
    target: str | Path,
    *,
    requested: str,
    embeddings_key: str = DEFAULT_EMBEDDINGS_KEY,
    chunk_rows: int = DEFAULT_CHUNK_ROWS,
    index_factory: str = DEFAULT_FACTORY,
) -> dict[str, Any]:
    """Clean every embedding in ``source`` with ``version`` into ``target``; returns the manifest written beside it.

    Parameters
    ----------
    version : StoredVersion
        A verified version (from :meth:`Registry.read_version`).
    source, target : path
        ``.npy`` (a 2-D array) or Parquet (``embeddings_key`` names the list column); a ``.npy``
        source may also go into a faiss index (``target`` ending in ``.faiss``).
    requested : str
        The version or alias the caller asked for, recorded in the manifest.
    embeddings_key : str, default="embedding"
        The Parquet embedding column.
    chunk_rows : int, default=8192
        Rows cleaned at a time; memory is bounded by this, not the corpus size
        (an index holds every row it is given, in memory, until it is written).
    index_factory : str, default="Flat"
        The faiss factory string of a ``.faiss`` target, e.g. ``"HNSW32"``;
        its metric is inner product.

    Raises
    ------
    DataError
        Missing or unreadable input, wrong dimension, NaN rows, output onto input.
        A partly written output is removed; an existing ``target`` is only
        replaced by a complete one.
    """
    source, target = Path(source), Path(target)
    if not source.is_file():
        raise DataError(f"{source} does not exist or is not a file")
    if chunk_rows < 1:
        raise DataError(f"the chunk size must be at least 1 row, got {chunk_rows}")
    suffix, target_suffix = source.suffix.lower(), target.suffix.lower()
    into_index = suffix == ".npy" and target_suffix == INDEX_SUFFIX
    if (
        suffix != target_suffix
        and not into_index
        and not (suffix in PARQUET_SUFFIXES and target_suffix in PARQUET_SUFFIXES)
    ):
        raise DataError(
            f"the output keeps the input's format: {source.name} in, so a {suffix} file out"
            + (f" (or a {INDEX_SUFFIX} index)" if suffix == ".npy" else "")
        )
    if target.exists() and target.resolve() == source.resolve():
        raise DataError("the output would overwrite the input; write the cleaned corpus to a new file")
    if not target.parent.is_dir():
        raise DataError(f"the output folder {target.parent} does not exist")
    temporary = _temporary_beside(target)
    try:
        if into_index:
            rows, dtype = _apply_index(version, source, temporary, chunk_rows, index_factory)
        elif suffix == ".npy":
            rows, dtype = _apply_npy(version, source, temporary, chunk_rows)
        elif suffix in PARQUET_SUFFIXES:
            rows, dtype = _apply_parquet(version, source, temporary, chunk_rows, embeddings_key)
        else:
            raise DataError(f"{source}: unsupported corpus format {suffix or '(no suffix)'}; use .npy or .parquet")
        with temporary.open("rb+") as handle:
            os.fsync(handle.fileno())
        os.replace(temporary, target)
    except BaseException:
        temporary.unlink(missing_ok=True)
        raise
    manifest = {
        "eraser": version.name,
        "version": version.id,
        "requested": requested,
        "dim": version.artifact.map.dim,
        "normalize": version.artifact.normalize,
        "input": {"path": str(source), "sha256": file_sha256(source), "rows": rows},
        "output": {"path": str(target), "sha256": file_sha256(target), "dtype": dtype},
        "created_at": datetime.now(UTC).isoformat(timespec="seconds"),
        "created_by": current_user(),
    }
    manifest_file = manifest_path(target)
    partial = _temporary_beside(manifest_file)
    partial.write_text(json.dumps(manifest, indent=2) + "\n", encoding="utf-8")
    os.replace(partial, manifest_file)
    return manifest
