"""Several contexts and several attributes: the within-value moments of every (context column, attribute) pair.

Each context column is guarded on its own: ``Cov(x', z_a | c_i = v) = 0``
for every column ``c_i``, each of its values ``v`` and every categorical
attribute ``z_a``.  A ranker compares items within one column's value (one
query's category, one opening's field), so that is the guarantee it reads.
The guarantee within the combinations of several columns is a different
one (neither implies the other: a mean gap within every combination can
cancel within a column's value, and the reverse); a fit that needs it gets
one column holding the combined value.

The pairs stay :class:`~veil.maps.context.ContextMoments` each, merged pair
by pair, so a streamed or distributed fit equals the fit in memory.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil.maps.attribute import EncodedAttribute
from veil.maps.context import ContextMoments, checked_context

Float64Array = NDArray[np.float64]

#: The name of a context given as one unnamed array (``fit(X, z, given=values)``).
UNNAMED = "given"


def context_columns(given: object, n_rows: int) -> dict[str, NDArray[np.generic]]:
    """Context columns by name, each checked to hold one label per row.

    ``given`` is one array of values (one context, named ``"given"``), a
    mapping of names to arrays, or a 2-D table (a data frame's columns by
    their names, an array's by their positions).
    """
    columns: dict[str, Any]
    if isinstance(given, Mapping):
        columns = {str(name): values for name, values in given.items()}
    elif hasattr(given, "columns") and getattr(given, "ndim", 1) == 2:
        columns = {str(name): given[name] for name in given.columns}  # type: ignore[index]
    else:
        array = np.asarray(given)
        columns = {UNNAMED: array} if array.ndim != 2 else {str(i): array[:, i] for i in range(array.shape[1])}
    if not columns:
        raise ValueError("given names no context column")
    single = list(columns) == [UNNAMED]
    return {
        name: checked_context(np.asarray(values), n_rows, what="context values" if single else f"context {name!r}")
        for name, values in columns.items()
    }


def attribute_labels(attribute: EncodedAttribute) -> dict[str, NDArray[np.generic]]:
    """Each categorical attribute's class label on every row, by name (``""`` for one unnamed attribute).

    Refuses what the within-value moments cannot hold: a numeric attribute
    matrix, a continuous attribute, or incomplete labels.
    """
    if attribute.labels is not None:
        return {"": attribute.labels[attribute.codes]}
    if not attribute.blocks:
        raise ValueError("guarding within a context needs categorical attributes (class labels z), not a matrix")
    if attribute.present:
        raise ValueError("guarding within a context needs every attribute on every row, not incomplete labels")
    labels = {}
    for block in attribute.blocks:
        if block.labels is None:
            raise ValueError(f"guarding within a context needs categorical attributes; {block.name!r} is continuous")
        codes = np.argmax(attribute.matrix[:, block.start : block.stop], axis=1)
        labels[block.name] = block.labels[codes]
    return labels


@dataclass(frozen=True, eq=False)
class GivenMoments:
    """The within-value moments of every pair of a context column and a categorical attribute.

    Attributes
    ----------
    columns : tuple of str
        The context columns, in the order given.
    attributes : tuple of str
        The categorical attributes (the joint one included), in the order of
        the attribute's blocks; ``("",)`` for one attribute given as labels.
    moments : tuple of ContextMoments
        One per pair, column by column: ``moments[i * len(attributes) + a]``.
    """

    columns: tuple[str, ...]
    attributes: tuple[str, ...]
    moments: tuple[ContextMoments, ...]

    @classmethod
    def from_batch(
        cls, x: NDArray[np.floating], attribute: EncodedAttribute, columns: Mapping[str, NDArray[np.generic]]
    ) -> GivenMoments:
        """The moments of rows ``x`` (n, d) within every value of every column of ``columns``."""
        labels = attribute_labels(attribute)
        moments = tuple(ContextMoments.from_batch(x, z, values) for values in columns.values() for z in labels.values())
        return cls(tuple(columns), tuple(labels), moments)

    def of(self, column: str, attribute: str = "") -> ContextMoments:
        """The moments of one pair."""
        if column not in self.columns or attribute not in self.attributes:
            raise ValueError(f"no moments within {column!r} for attribute {attribute!r}")
        return self.moments[self.columns.index(column) * len(self.attributes) + self.attributes.index(attribute)]

    def of_column(self, column: str) -> tuple[ContextMoments, ...]:
        """The moments of every attribute within ``column``."""
        return tuple(self.of(column, attribute) for attribute in self.attributes)

    def merge(self, other: GivenMoments) -> GivenMoments:
        """The moments of the union of both sets of rows, pair by pair."""
        if (self.columns, self.attributes) != (other.columns, other.attributes):
            raise ValueError(
                f"cannot merge moments within {list(self.columns)} of {list(self.attributes)} with moments within "
                f"{list(other.columns)} of {list(other.attributes)}"
            )
        return dataclasses.replace(
            self, moments=tuple(a.merge(b) for a, b in zip(self.moments, other.moments, strict=True))
        )

    def pooled(self, column: str, members: NDArray[np.generic]) -> GivenMoments:
        """The same moments with the values ``members`` of ``column`` pooled into one group, for every attribute."""
        at = self.columns.index(column) * len(self.attributes)
        moments = list(self.moments)
        for position in range(at, at + len(self.attributes)):
            moments[position] = moments[position].pooled_values(members)
        return dataclasses.replace(self, moments=tuple(moments))

    def standardized_cross_covariances(self) -> tuple[Float64Array, int]:
        """Every pair's stacked within-value columns (see :meth:`ContextMoments.standardized_cross_covariances`).

        Returns the stack, shape (d, r), and the number of pairs: each
        pair's columns have singular values at most 1, so the stack's are at
        most the square root of that number.
        """
        stacks = [moments.standardized_cross_covariances() for moments in self.moments]
        return np.hstack(stacks), len(stacks)
