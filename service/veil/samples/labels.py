"""Missing labels: which values count as missing, and the refusal (or the drop) that follows.

A blank cell, ``NA``, ``N/A``, ``NaN`` or ``null`` (any case, surrounding
spaces ignored), a NaN number or a Parquet null is a missing label, never a
class of its own: a fit refuses it, naming the column, the count and the first
row, unless the caller asks for those rows to be dropped.
"""

from __future__ import annotations

from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil.errors import DataError

MISSING_TEXT = ("", "na", "n/a", "nan", "null")
#: How the refusal and the card describe a missing label.
MISSING_KINDS = "blank, NA, NaN or null"


def missing_labels(values: NDArray[Any]) -> NDArray[np.bool_]:
    """True where a label is missing: missing-looking text or a NaN number.

    Parameters
    ----------
    values : ndarray of shape (n,)

    Returns
    -------
    mask : ndarray of shape (n,), dtype bool
    """
    if values.dtype.kind in "US":
        text = np.char.lower(np.char.strip(values.astype(str)))
        return np.asarray(np.isin(text, MISSING_TEXT))
    if values.dtype.kind == "f":
        return np.asarray(np.isnan(values))
    return np.zeros(values.shape, dtype=bool)


def arrow_labels(column: Any, *, key: str, source: str) -> tuple[NDArray[Any], NDArray[np.bool_]]:
    """A Parquet label column as a NumPy array (nulls filled in), with the mask of its missing labels.

    Parameters
    ----------
    column : pyarrow.Array or pyarrow.ChunkedArray
        Strings (plain or dictionary-encoded), integers, floats or booleans.
    key, source : str
        The column's name and the file, for error messages.

    Returns
    -------
    values : ndarray of shape (n,)
    missing : ndarray of shape (n,), dtype bool
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    if pa.types.is_dictionary(column.type):
        column = column.cast(column.type.value_type)
    nulls = np.asarray(column.is_null().to_numpy(zero_copy_only=False), dtype=bool)
    if pa.types.is_string(column.type) or pa.types.is_large_string(column.type):
        values = np.asarray(pc.fill_null(column, "").to_numpy(zero_copy_only=False)).astype(str)
    elif pa.types.is_integer(column.type) or pa.types.is_floating(column.type):
        values = np.asarray(pc.fill_null(column, pa.scalar(0, column.type)).to_numpy(zero_copy_only=False))
    elif pa.types.is_boolean(column.type):
        values = np.asarray(pc.fill_null(column, False).to_numpy(zero_copy_only=False))
    else:
        raise DataError(f"{source}: column {key!r} holds {column.type}; labels must be numbers or strings")
    return values, nulls | missing_labels(values)


def rows_to_keep(
    missing: list[tuple[str, str, NDArray[np.bool_]]], *, source: str, drop: bool
) -> NDArray[np.bool_] | None:
    """Refuse missing labels, or say which rows remain once they are dropped.

    Parameters
    ----------
    missing : list of (role, key, mask)
        For each label column read: its role (``"attribute"`` or ``"task"``),
        its key, and the mask of its missing labels.
    source : str
        The file, for the message.
    drop : bool
        Drop rows with a missing label instead of refusing them.

    Returns
    -------
    kept : ndarray of shape (n,), dtype bool, or None
        The rows whose labels are all present; None when none is missing.

    Raises
    ------
    DataError
        A label is missing and ``drop`` is False: names the column, the count and the first row.
    """
    if not drop:
        for role, key, mask in missing:
            if mask.any():
                raise DataError(
                    f"{source}: {int(np.count_nonzero(mask))} row(s) have no {role} label in {key!r} "
                    f"({MISSING_KINDS}), the first at row {int(np.flatnonzero(mask)[0])} (from 0); "
                    "fill them in, or drop those rows (--drop-missing)"
                )
    combined = np.logical_or.reduce([mask for _, _, mask in missing])
    return None if not combined.any() else ~combined


def dropped_note(dropped: int, total: int) -> str:
    """The card's note for rows dropped for a missing label."""
    return f"{dropped} of {total} rows were dropped for a missing attribute or task label ({MISSING_KINDS})"
