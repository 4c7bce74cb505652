"""Embedding columns in Arrow tables (Parquet files) to NumPy matrices and back, without Python loops over rows."""

from __future__ import annotations

from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from numpy.typing import NDArray

from veil.errors import DataError


def _list_type(column_type: pa.DataType) -> bool:
    return bool(pa.types.is_list(column_type) or pa.types.is_large_list(column_type))


def embedding_matrix(column: pa.Array | pa.ChunkedArray, *, name: str, first_row: int = 0) -> NDArray[Any]:
    """The rows of a list or fixed-size-list column of numbers as an ``(n, d)`` float array.

    Parameters
    ----------
    column : pyarrow array
        ``list<float>``, ``large_list<float>`` or ``fixed_size_list<float>[d]``.
    name : str
        The column's name, for error messages.
    first_row : int
        Index of the column's first row in the whole file, for error messages.

    Raises
    ------
    DataError
        The column is not a list of numbers, has nulls, or its rows differ in length.
    """
    if isinstance(column, pa.ChunkedArray):
        column = column.combine_chunks()
    column_type = column.type
    if not (_list_type(column_type) or pa.types.is_fixed_size_list(column_type)):
        raise DataError(f"column {name!r} holds {column_type}, not a list of numbers per row")
    value_type = column_type.value_type
    if not (pa.types.is_floating(value_type) or pa.types.is_integer(value_type)):
        raise DataError(f"column {name!r} holds lists of {value_type}; embeddings must be numbers")
    if column.null_count:
        row = int(np.flatnonzero(column.is_null().to_numpy(zero_copy_only=False))[0])
        raise DataError(f"column {name!r} has an empty (null) embedding at row {first_row + row}")
    if len(column) == 0:
        return np.empty((0, 0), dtype=np.float32)
    if pa.types.is_fixed_size_list(column_type):
        dim = column_type.list_size
    else:
        lengths = pc.list_value_length(column).to_numpy(zero_copy_only=False)
        dim = int(lengths[0])
        odd = np.flatnonzero(lengths != dim)
        if odd.size:
            raise DataError(
                f"column {name!r} mixes dimensions: row {first_row} has {dim} values "
                f"but row {first_row + int(odd[0])} has {int(lengths[odd[0]])}"
            )
    values = column.flatten()
    if values.null_count:
        raise DataError(f"column {name!r} has missing values inside an embedding")
    matrix: NDArray[Any] = values.to_numpy(zero_copy_only=False).reshape(len(column), dim)
    if not np.issubdtype(matrix.dtype, np.floating):
        matrix = matrix.astype(np.float64)
    return matrix


def embedding_column(matrix: NDArray[np.floating], *, like: pa.DataType) -> pa.Array:
    """``matrix`` as a column of the same list type as ``like`` (list, large list or fixed-size list)."""
    n, dim = matrix.shape
    values = pa.array(np.ascontiguousarray(matrix).reshape(-1))
    if pa.types.is_fixed_size_list(like):
        return pa.FixedSizeListArray.from_arrays(values, dim)
    offsets = np.arange(0, (n + 1) * dim, dim, dtype=np.int64 if pa.types.is_large_list(like) else np.int32)
    if pa.types.is_large_list(like):
        return pa.LargeListArray.from_arrays(pa.array(offsets), values)
    return pa.ListArray.from_arrays(pa.array(offsets), values)
