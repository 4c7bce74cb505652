"""Checks and encodings of the attribute ``z`` shared by every eraser and the audit.

Several attributes of the same rows travel together as one table made by
:func:`veil.samples.attributes.attribute_table`.  Encoded, they are one
stacked matrix: an indicator block per categorical attribute, one column per
continuous one, and, on request, an indicator block of the joint classes.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from veil.samples.attributes import attribute_columns, is_incomplete, present_rows, table_spec


@dataclass(frozen=True, eq=False)
class AttributeBlock:
    """One attribute's columns in a stacked attribute matrix.

    Attributes
    ----------
    name : str
    labels : ndarray of shape (c,) or None
        The sorted classes of a categorical attribute (column ``start + j`` is
        the indicator of ``labels[j]``); None for a continuous one (one column).
    start, stop : int
        Its columns are ``start:stop`` of the stacked matrix.
    joint : bool
        The block holds the joint classes of the categorical attributes.
    """

    name: str
    labels: NDArray[np.generic] | None
    start: int
    stop: int
    joint: bool = False

    @property
    def is_categorical(self) -> bool:
        return self.labels is not None

    @property
    def kind(self) -> str:
        return "joint" if self.joint else "categorical" if self.labels is not None else "continuous"

    def same_as(self, other: AttributeBlock) -> bool:
        return (
            self.name == other.name
            and self.kind == other.kind
            and self.start == other.start
            and self.stop == other.stop
            and (self.labels is None or other.labels is None or np.array_equal(self.labels, other.labels))
        )


@dataclass(frozen=True)
class EncodedAttribute:
    """An attribute as the moment statistics see it.

    Attributes
    ----------
    labels : ndarray of shape (m,) or None
        The sorted class labels when the attribute is categorical (1-D input);
        column ``j`` of ``matrix`` is then the indicator of ``labels[j]``.
        ``None`` for a numeric 2-D attribute (one-hot blocks, or continuous)
        and for several attributes.
    matrix : ndarray of shape (n, m), float64
    blocks : tuple of AttributeBlock
        Each attribute's columns when ``z`` held several (an :func:`attribute_table`); empty otherwise.
    present : tuple of ndarray of shape (n,), dtype bool
        Incomplete labels: for each block, the rows that carry it (``matrix``
        is zero elsewhere); empty when every row carries every attribute.
    """

    labels: NDArray[np.generic] | None
    matrix: NDArray[np.float64]
    blocks: tuple[AttributeBlock, ...] = ()
    present: tuple[NDArray[np.bool_], ...] = ()

    @property
    def is_categorical(self) -> bool:
        return self.labels is not None

    @property
    def codes(self) -> NDArray[np.intp]:
        """Class index of each row (categorical attributes), shape (n,)."""
        if self.labels is None:
            raise ValueError("class codes need a categorical (1-D) attribute")
        return np.asarray(np.argmax(self.matrix, axis=1), dtype=np.intp)


def as_label_array(z: NDArray[np.generic], *, what: str = "attribute labels") -> NDArray[np.generic]:
    """Labels as strings or numbers NumPy can sort and store (object arrays of str or int converted); refuses the rest.

    ``what`` names the labels in the message (``"context values"``, say).
    """
    if z.dtype == object:
        values = list(z)
        if all(isinstance(v, str) for v in values):
            return np.asarray(values, dtype=str)
        if all(isinstance(v, (int, np.integer, bool, np.bool_)) for v in values):
            return np.asarray(values, dtype=np.int64)
        raise ValueError(f"{what} must be all strings or all integers; got a mix or missing values")
    if z.dtype.kind == "f" and not np.all(np.isfinite(z)):
        raise ValueError(f"{what} contain NaN or infinity")
    if z.dtype.kind not in "biufUS":
        raise ValueError(f"{what} must be integers or strings, not {z.dtype}")
    return z


def indexed_column(
    values: object, n_rows: int, *, column: str, what: str
) -> tuple[NDArray[np.generic], NDArray[np.intp]]:
    """A per-row column's sorted values and each row's index among them; ``ValueError`` naming what is wrong.

    ``column`` names the column in the shape message (``"the context"``), ``what`` its values in the others.
    """
    array = np.asarray(values)
    if array.ndim != 1 or array.shape[0] != n_rows:
        raise ValueError(f"{column} needs one value per row: got shape {array.shape} for {n_rows} rows")
    names, index = np.unique(as_label_array(array, what=what), return_inverse=True)
    return names, index.reshape(-1).astype(np.intp)


def encode_attribute(z: object, n_rows: int, *, require_categorical: bool = False) -> EncodedAttribute:
    """Validate ``z`` against ``n_rows`` rows of ``X`` and encode it.

    Parameters
    ----------
    z : array-like of shape (n,) or (n, m)
        1-D: class labels (integers or strings). 2-D: a numeric attribute
        matrix (one-hot blocks for several attributes, or continuous columns).
    n_rows : int
        Number of rows of ``X``.
    require_categorical : bool, default=False
        Refuse 2-D attributes (for erasers that train classifiers).

    Returns
    -------
    EncodedAttribute
    """
    if isinstance(z, np.ndarray) and z.dtype.names is not None:
        if require_categorical:
            raise ValueError(
                "this method erases one categorical attribute; several attributes need LEACE or mean projection"
            )
        if z.ndim != 1 or z.shape[0] != n_rows:
            raise ValueError(f"X has {n_rows} rows but the attribute table has shape {z.shape}; they must match")
        return _encode_table(z)
    if z is None:
        # The parenthesis is scikit-learn's wording, which its tooling looks for.
        raise ValueError(
            "this eraser needs the attribute z, or attribute= by keyword (requires y to be passed, but the target y "
            "is None)"
        )
    array = np.asarray(z)
    if array.ndim == 0 or array.ndim > 2:
        raise ValueError(f"z must be 1-D labels or a 2-D attribute matrix; got {array.ndim}-D")
    if array.shape[0] != n_rows:
        raise ValueError(f"X has {n_rows} rows but z has {array.shape[0]}; they must match")
    if array.ndim == 2 and array.shape[1] == 1 and require_categorical:
        array = array[:, 0]
    if array.ndim == 1:
        labels, inverse = np.unique(as_label_array(array), return_inverse=True)
        matrix = np.zeros((n_rows, labels.size))
        matrix[np.arange(n_rows), inverse] = 1.0
        return EncodedAttribute(labels=labels, matrix=matrix)
    if require_categorical:
        raise ValueError("this eraser needs 1-D class labels z, not a 2-D attribute matrix")
    if array.dtype.kind not in "biuf":
        raise ValueError(f"a 2-D attribute must be numeric, not {array.dtype}")
    matrix = array.astype(np.float64)
    if not np.all(np.isfinite(matrix)):
        raise ValueError("the attribute matrix z contains NaN or infinity")
    if matrix.shape[1] == 0:
        raise ValueError("the attribute matrix z has no columns")
    return EncodedAttribute(labels=None, matrix=matrix)


def _encode_table(z: NDArray[np.void]) -> EncodedAttribute:
    n_rows = z.shape[0]
    blocks: list[AttributeBlock] = []
    matrices: list[NDArray[np.float64]] = []
    start = 0
    _, _, joint = table_spec(z)
    columns = attribute_columns(z)
    incomplete = is_incomplete(z)
    present: list[NDArray[np.bool_]] = []
    for position, (name, is_continuous, values) in enumerate(columns):
        rows = present_rows(z, name)
        present.append(rows)
        if is_continuous:
            column = np.where(rows, np.asarray(values, dtype=np.float64), 0.0)
            if not np.all(np.isfinite(column)):
                raise ValueError(f"continuous attribute {name!r} holds NaN or infinity")
            matrices.append(column[:, None])
            blocks.append(AttributeBlock(name=name, labels=None, start=start, stop=start + 1))
            start += 1
            continue
        labels, inverse = np.unique(values[rows], return_inverse=True)
        matrix = np.zeros((n_rows, labels.size))
        matrix[np.flatnonzero(rows), inverse] = 1.0
        matrices.append(matrix)
        is_joint = joint and position == len(columns) - 1
        blocks.append(AttributeBlock(name=name, labels=labels, start=start, stop=start + labels.size, joint=is_joint))
        start += labels.size
    return EncodedAttribute(
        labels=None, matrix=np.hstack(matrices), blocks=tuple(blocks), present=tuple(present) if incomplete else ()
    )


def check_enough_rows(n_rows: int, labels: NDArray[np.generic] | None) -> None:
    """Refuse fits that cannot estimate what the erasers need.

    A categorical attribute needs two classes or more, and more rows than
    classes (otherwise every class mean is a single point and no within-class
    spread is left to estimate); a numeric one needs two rows or more.
    """
    if labels is None:
        if n_rows < 2:
            raise ValueError(f"need at least 2 rows to fit, got {n_rows}")
        return
    if labels.size < 2:
        raise ValueError(
            f"z has only one class ({labels[0]!r}); erasure needs two classes or more" if labels.size else "z is empty"
        )
    if n_rows <= labels.size:
        raise ValueError(f"need more rows than classes: got {n_rows} rows for {labels.size} classes")


def check_positive_int(name: str, value: object) -> None:
    """Refuse an estimator parameter that must be a positive integer."""
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 1:
        raise ValueError(f"{name} must be a positive integer, got {value!r}")


def check_blocks(n_rows: int, blocks: tuple[AttributeBlock, ...], spread: NDArray[np.float64]) -> None:
    """Refuse several attributes a fit cannot use, naming the attribute.

    ``spread`` is each stacked column's variance on the fitting rows: a
    categorical attribute needs two classes or more, a continuous one two
    distinct values, and the fit more rows than the stacked columns.
    """
    width = blocks[-1].stop if blocks else 0
    for block in blocks:
        if block.labels is not None:
            seen = int(np.count_nonzero(spread[block.start : block.stop] > 0))
            if seen < 2:
                raise ValueError(f"attribute {block.name!r} has only one class; erasure needs two classes or more")
        elif not spread[block.start] > 0:
            raise ValueError(f"continuous attribute {block.name!r} takes a single value; there is nothing to erase")
    if n_rows <= width:
        raise ValueError(f"need more rows than attribute columns: got {n_rows} rows for {width} columns")
