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
#: Ends the name of the field that marks the rows lacking an attribute, in a table of incomplete labels.
MISSING_SUFFIX = "~missing"


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
    columns: Mapping[str, ArrayLike],
    *,
    continuous: Iterable[str] = (),
    joint: bool = False,
    missing: Mapping[str, ArrayLike] | None = None,
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
    missing : mapping of str to bool array-like of shape (n,), optional
        Incomplete labels: the rows that lack each attribute (their values are
        ignored).  Each attribute's statistics then come from the rows that
        carry it (the intersection's from the rows that carry every
        categorical one); a row must carry at least one attribute.

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
        if not isinstance(name, str) or not name or JOINT_NAME_SEPARATOR in name or MISSING_SUFFIX in name:
            raise ValueError(
                f"attribute names must be non-empty text without {JOINT_NAME_SEPARATOR!r} or {MISSING_SUFFIX!r}; "
                f"got {name!r}"
            )
    unknown = [name for name in marked if name not in columns]
    if unknown:
        raise ValueError(f"{unknown[0]!r} is marked continuous but is not one of the attributes {names}")
    masks = _missing_masks(names, missing)
    arrays: dict[str, NDArray[np.generic]] = {}
    for name in names:
        values = np.asarray(columns[name])
        if values.ndim != 1:
            raise ValueError(f"attribute {name!r} must hold one value per row, got shape {values.shape}")
        absent = masks.get(name)
        if name in marked:
            if values.dtype.kind not in "biuf":
                raise ValueError(f"attribute {name!r} is marked continuous but holds {values.dtype} values")
            arrays[name] = values.astype(np.float64)
            if absent is not None and absent.shape == values.shape:
                # A placeholder the statistics never read: the mask says the row lacks the value.
                arrays[name] = np.where(absent, 0.0, arrays[name])
        elif absent is not None and absent.shape == values.shape and values.dtype.kind == "f":
            arrays[name] = _as_labels(name, np.where(absent, 0.0, values))
        else:
            arrays[name] = _as_labels(name, values)
    for name, absent in masks.items():
        arrays[name + MISSING_SUFFIX] = absent
    lengths = {name: array.shape[0] for name, array in arrays.items()}
    if len(set(lengths.values())) > 1:
        raise ValueError(f"the attributes have different numbers of rows: {lengths}")
    if joint and len(names) - len(set(marked)) < 2:
        raise ValueError("the intersection (joint classes) needs at least two categorical attributes")
    if len(masks) == len(names):
        lacking = np.logical_and.reduce([masks[name] for name in names])
        if lacking.any():
            raise ValueError(
                f"{int(lacking.sum())} row(s) lack every attribute, the first at row {int(np.argmax(lacking))}; "
                "drop them (they carry nothing to guard)"
            )
    spec = {"continuous": tuple(name for name in names if name in marked), "joint": bool(joint)}
    fields = list(arrays)
    dtype = np.dtype([(name, arrays[name].dtype) for name in fields], metadata={TABLE_METADATA: spec})
    table = np.empty(lengths[names[0]], dtype=dtype)
    for name in fields:
        table[name] = arrays[name]
    return table


def _missing_masks(names: list[str], missing: Mapping[str, ArrayLike] | None) -> dict[str, NDArray[np.bool_]]:
    """The masks of rows lacking each attribute that lacks any (the others are complete)."""
    masks: dict[str, NDArray[np.bool_]] = {}
    for name, mask in (missing or {}).items():
        if name not in names:
            raise ValueError(f"missing labels are given for {name!r}, which is not one of the attributes {names}")
        array = np.asarray(mask)
        if array.dtype != np.bool_ or array.ndim != 1:
            raise ValueError(f"the missing-label mask of {name!r} must be one boolean per row")
        if array.any():
            masks[name] = array
    return masks


def present_rows(z: NDArray[np.void], name: str) -> NDArray[np.bool_]:
    """The rows of a table that carry attribute ``name`` (the intersection: every categorical one), shape (n,)."""
    names, continuous, _ = table_spec(z)
    fields = z.dtype.names or ()
    joint = JOINT_NAME_SEPARATOR in name
    wanted = [other for other in names if other not in continuous] if joint else [name]
    present = np.ones(z.shape[0], dtype=bool)
    for other in wanted:
        if other + MISSING_SUFFIX in fields:
            present &= ~np.asarray(z[other + MISSING_SUFFIX])
    return present


def is_incomplete(z: NDArray[np.void]) -> bool:
    """Whether a table marks rows that lack an attribute (its statistics then come attribute by attribute)."""
    return any(field.endswith(MISSING_SUFFIX) for field in z.dtype.names or ())


def table_spec(z: NDArray[np.void]) -> tuple[tuple[str, ...], frozenset[str], bool]:
    """The attributes of a table made by :func:`attribute_table`: names, the continuous ones, and the joint flag."""
    metadata: Mapping[str, Any] = z.dtype.metadata or {}
    spec = metadata.get(TABLE_METADATA)
    if spec is None or z.dtype.names is None:
        raise ValueError(
            "several attributes must come as veil.attribute_table(...), which marks the continuous ones; "
            "a plain structured array does not say which are continuous"
        )
    names = tuple(name for name in z.dtype.names if not name.endswith(MISSING_SUFFIX))
    return names, frozenset(spec["continuous"]), bool(spec["joint"])


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
