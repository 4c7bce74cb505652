"""Several protected attributes of the same rows, as one table: which are continuous, and their intersection.

Several attributes (gender, an age bracket, age in years) travel together as
one structured array made by :func:`attribute_table`.  Its dtype records which
of them are continuous, as the caller marked them (never guessed from a
dtype), and whether their intersection (the joint classes of the categorical
ones) is guarded too.  Rows select and concatenate like any 1-D array.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from typing import Any

import numpy as np
from numpy.typing import ArrayLike, NDArray

#: Key of the structured dtype's metadata under which :func:`attribute_table` marks its columns.
TABLE_METADATA = "veil.attributes"
#: Joins the attributes' names in the joint attribute's name, and their classes in its class labels.
JOINT_NAME_SEPARATOR = "&"
JOINT_LABEL_SEPARATOR = "|"


def is_table(z: object) -> bool:
    """Whether ``z`` is an attribute table (several attributes, or a continuous one) rather than one label column."""
    return isinstance(z, np.ndarray) and z.dtype.names is not None


def _as_labels(name: str, values: NDArray[Any]) -> NDArray[Any]:
    if values.dtype == object:
        items = list(values)
        if all(isinstance(v, str) for v in items):
            return np.asarray(items, dtype=str)
        if all(isinstance(v, (int, np.integer, bool, np.bool_)) for v in items):
            return np.asarray(items, dtype=np.int64)
        raise ValueError(f"attribute {name!r}: labels must be all strings or all integers")
    if values.dtype.kind == "f" and not np.all(np.isfinite(values)):
        raise ValueError(f"attribute {name!r}: labels contain NaN or infinity")
    if values.dtype.kind not in "biufUS":
        raise ValueError(f"attribute {name!r}: labels must be integers or strings, not {values.dtype}")
    return values


def attribute_table(
    columns: Mapping[str, ArrayLike], *, continuous: Iterable[str] = (), joint: bool = False
) -> NDArray[np.void]:
    """Several attributes of the same rows, as one ``z`` for every veil eraser that can guard them together.

    Parameters
    ----------
    columns : mapping of str to array-like of shape (n,)
        Each attribute's values by name, in the order they are stacked.
    continuous : iterable of str
        The attributes to treat as continuous (age in years, a score); every
        other one is categorical, whatever its dtype.
    joint : bool, default=False
        Also guard the intersection: the joint classes of the categorical
        attributes (guarding each one alone leaves their combination readable).

    Returns
    -------
    z : structured ndarray of shape (n,)
        One field per attribute (continuous ones as float64), its dtype marked
        so that encoding knows which are continuous.
    """
    names = list(columns)
    marked = list(continuous)
    if not names:
        raise ValueError("the attribute table needs at least one attribute")
    for name in names:
        if not isinstance(name, str) or not name or JOINT_NAME_SEPARATOR in name:
            raise ValueError(f"attribute names must be non-empty text without {JOINT_NAME_SEPARATOR!r}; got {name!r}")
    unknown = [name for name in marked if name not in columns]
    if unknown:
        raise ValueError(f"{unknown[0]!r} is marked continuous but is not one of the attributes {names}")
    arrays: dict[str, NDArray[np.generic]] = {}
    for name in names:
        values = np.asarray(columns[name])
        if values.ndim != 1:
            raise ValueError(f"attribute {name!r} must hold one value per row, got shape {values.shape}")
        if name in marked:
            if values.dtype.kind not in "biuf":
                raise ValueError(f"attribute {name!r} is marked continuous but holds {values.dtype} values")
            arrays[name] = values.astype(np.float64)
        else:
            arrays[name] = _as_labels(name, values)
    lengths = {name: array.shape[0] for name, array in arrays.items()}
    if len(set(lengths.values())) > 1:
        raise ValueError(f"the attributes have different numbers of rows: {lengths}")
    if joint and len(names) - len(set(marked)) < 2:
        raise ValueError("the intersection (joint classes) needs at least two categorical attributes")
    spec = {"continuous": tuple(name for name in names if name in marked), "joint": bool(joint)}
    dtype = np.dtype([(name, arrays[name].dtype) for name in names], metadata={TABLE_METADATA: spec})
    table = np.empty(lengths[names[0]], dtype=dtype)
    for name in names:
        table[name] = arrays[name]
    return table


def table_spec(z: NDArray[np.void]) -> tuple[tuple[str, ...], frozenset[str], bool]:
    """The attributes of a table made by :func:`attribute_table`: names, the continuous ones, and the joint flag."""
    metadata: Mapping[str, Any] = z.dtype.metadata or {}
    spec = metadata.get(TABLE_METADATA)
    if spec is None or z.dtype.names is None:
        raise ValueError(
            "several attributes must come as veil.attribute_table(...), which marks the continuous ones; "
            "a plain structured array does not say which are continuous"
        )
    return tuple(z.dtype.names), frozenset(spec["continuous"]), bool(spec["joint"])


def joint_name(names: Iterable[str]) -> str:
    """The name of the intersection of these categorical attributes, e.g. ``gender&age_bracket``."""
    return JOINT_NAME_SEPARATOR.join(names)


def joint_labels(z: NDArray[np.void]) -> NDArray[np.str_]:
    """Each row's joint class (its categorical attributes' classes joined), shape (n,)."""
    names, continuous, _ = table_spec(z)
    parts = [np.asarray(z[name]).astype(str) for name in names if name not in continuous]
    out = parts[0]
    for part in parts[1:]:
        out = np.char.add(np.char.add(out, JOINT_LABEL_SEPARATOR), part)
    return np.asarray(out)


def attribute_columns(z: NDArray[np.void]) -> list[tuple[str, bool, NDArray[np.generic]]]:
    """``(name, is_continuous, values)`` of each attribute in a table, the joint classes last when guarded."""
    names, continuous, joint = table_spec(z)
    out: list[tuple[str, bool, NDArray[np.generic]]] = [
        (name, name in continuous, np.asarray(z[name])) for name in names
    ]
    if joint:
        out.append((joint_name(name for name in names if name not in continuous), False, joint_labels(z)))
    return out


def split_strata(z: NDArray[Any]) -> NDArray[np.intp]:
    """Each row's stratum for a split that gives every class rows on both sides, shape (n,).

    One label column: its classes.  A table: the joint classes of its
    categorical attributes (every class of each is then on both sides too);
    one stratum if all are continuous.
    """
    if not is_table(z):
        return np.asarray(np.unique(z, return_inverse=True)[1], dtype=np.intp)
    names, continuous, _ = table_spec(z)
    if all(name in continuous for name in names):
        return np.zeros(z.shape[0], dtype=np.intp)
    return np.asarray(np.unique(joint_labels(z), return_inverse=True)[1], dtype=np.intp)
