"""Contexts in the fitting job: the request and sample agree on them, and their values are large enough.

The small-class rules apply within each value of each context column: a
(value, class) cell is a class of its own there.  A value with a cell of
fewer than :data:`~veil.defaults.MIN_CLASS_ROWS` fitting rows is refused,
naming it, or, on request (``--pool-small-values``), pooled with the other
such values of its column into one group, whose guarantee then holds for
their rows together.  Pooling acts on the merged moments, so a streamed or
distributed fit pools exactly as the fit in memory does.
"""

from __future__ import annotations

import dataclasses
from typing import Any

import numpy as np

from veil.defaults import FEW_CLASS_ROWS, MIN_CLASS_ROWS
from veil.errors import DataError
from veil.fitting.request import MethodSpec
from veil.maps.context import ContextMoments
from veil.maps.given import GivenMoments
from veil.maps.moments import MomentState
from veil.samples.attributes import MISSING_SUFFIX, table_spec
from veil.samples.chunks import Sample

#: What the card and the messages call the group of pooled values.
POOLED = "the pooled values"


def check_context_options(sample: Sample, spec: MethodSpec) -> None:
    """Refuse, before the pass, contexts the request and the sample do not agree on, or attributes they cannot
    guard (the request checks the rest)."""
    wanted, read = spec.context_columns, tuple(sample.context_keys)
    if not wanted and read:
        raise DataError(
            f"the sample was read with the context {', '.join(map(repr, read))} but the request guards no context "
            f"(MethodSpec(given={read!r}))"
        )
    if wanted != read:
        raise DataError(f"the request guards within {wanted!r}: read the sample with given={wanted!r}")
    if wanted and sample.attribute_dtype is not None:
        _check_table(sample.attribute_dtype)


def _check_table(dtype: np.dtype[Any]) -> None:
    """Refuse several attributes the within-value moments cannot hold: a continuous one, incomplete labels."""
    _, continuous, _ = table_spec(np.empty(0, dtype=dtype))
    if continuous:
        raise DataError(
            f"guarding within a context (--given) needs categorical attributes; {sorted(continuous)[0]!r} is continuous"
        )
    if any(name.endswith(MISSING_SUFFIX) for name in dtype.names or ()):
        raise DataError("guarding within a context (--given) needs every attribute on every row, not incomplete labels")


def checked_contexts(
    moments: MomentState, attribute_key: str, *, pool: bool, poolable: bool = True
) -> tuple[MomentState, list[str]]:
    """The moments to fit from, with small values refused or pooled, and the card's notes on small cells.

    ``poolable``: whether the method can pool small values (the refusal then suggests it).
    """
    given = moments.given
    if given is None:
        return moments, []
    notes: list[str] = []
    for column in given.columns:
        small = _small_values(given, column, attribute_key)
        if small and not pool:
            raise DataError(_refusal(column, small, poolable=poolable))
        if small:
            given = given.pooled(column, np.array(list(small)))
            pooled = given.of_column(column)[0]
            notes.append(
                f"values {', '.join(map(repr, small))} of {column!r} have a class of fewer than {MIN_CLASS_ROWS} "
                f"fitting rows and were pooled into one group ({int(pooled.counts[-1])} fitting rows): the guarantee "
                f"within {column!r} holds for their rows together, not within each of them"
            )
            still = _small_values(given, column, attribute_key)
            if still:
                raise DataError(_refusal(column, still, pooled=True))
        for attribute, pair in zip(given.attributes, given.of_column(column), strict=True):
            notes += _cell_notes(pair, column, attribute or attribute_key)
    return dataclasses.replace(moments, given=given), notes


def _named_values(moments: ContextMoments) -> list[str]:
    """Each row's name in the messages: its value, or the pooled group (last)."""
    return [str(value) for value in moments.values] + ([POOLED] if moments.pooled.size else [])


def _small_values(given: GivenMoments, column: str, attribute_key: str) -> dict[str, str]:
    """The values of ``column`` with a cell of too few rows, for any attribute: what is small in each."""
    small: dict[str, str] = {}
    for attribute, pair in zip(given.attributes, given.of_column(column), strict=True):
        for name, counts in zip(_named_values(pair), pair.class_counts, strict=True):
            present = counts > 0
            for label, count in zip(pair.labels[present], counts[present], strict=True):
                if count < MIN_CLASS_ROWS and name not in small:
                    small[name] = f"class {str(label)!r} of {attribute or attribute_key!r}: {int(count)} row(s)"
    return small


def _refusal(column: str, small: dict[str, str], *, pooled: bool = False, poolable: bool = True) -> str:
    listed = "; ".join(f"{name!r} ({what})" for name, what in small.items())
    if pooled:
        return (
            f"pooled into one group, the small values of {column!r} still have too few rows of a class ({listed}); "
            f"a class needs at least {MIN_CLASS_ROWS} within each value: merge classes (--merge-classes), merge "
            "those values with larger ones, or add rows"
        )
    return (
        f"{len(small)} value(s) of {column!r} have a class with fewer than {MIN_CLASS_ROWS} fitting rows: {listed}; "
        f"a class needs at least {MIN_CLASS_ROWS} within each value: "
        + ("pool such values into one group (--pool-small-values), " if poolable else "")
        + f"merge classes (--merge-classes ATTRIBUTE:CLASS,OTHER=NEW), merge or drop those values of {column!r}, "
        "or add rows"
    )


def _cell_notes(moments: ContextMoments, column: str, attribute: str) -> list[str]:
    """Notes on cells of few rows, and on values of one class (they add nothing to the guarantee)."""
    notes = []
    for name, counts in zip(_named_values(moments), moments.class_counts, strict=True):
        present = counts > 0
        where = f"where {column!r} is {name!r}" if name != POOLED else f"in {POOLED} of {column!r}"
        notes += [
            f"class {str(label)!r} of {attribute!r} has only {int(count)} fitting rows {where} (fewer than "
            f"{FEW_CLASS_ROWS}): the within-value statistics there are uncertain"
            for label, count in zip(moments.labels[present], counts[present], strict=True)
            if count < FEW_CLASS_ROWS
        ]
        if np.count_nonzero(present) == 1:
            only = str(moments.labels[present][0])
            notes.append(
                f"every fitting row {where} has class {only!r} of {attribute!r}: that value adds nothing to the "
                "guarantee within the context"
            )
    return notes
