"""One pass over a sample: what each partition contributes to a fit, and how contributions merge.

Every row is held out or not by a seeded hash of its index in the files, so
a partition needs nothing from the others; its fitting rows give float64
moments (exact for LEACE and mean projection), and hash draws of both sides
give the bounded samples that the row-based methods, the audit, the
reference probe and the report use.  Merging is associative and keeps row
order, so a local loop and a tree reduction on Dask workers give the same
result (the moments to rounding, see :class:`veil.maps.moments.MomentState`).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil.errors import DataError
from veil.maps.attribute import encode_attribute
from veil.maps.moments import MomentState
from veil.samples.attributes import is_table, split_strata
from veil.samples.chunks import Chunk, Partition
from veil.samples.splitting import (
    give_every_class_both_groups,
    give_every_class_both_parts,
    held_out_groups,
    held_out_rows,
)

# Independent hash streams for the held-out split and the two samples drawn from its sides.
_HELD_SAMPLE_SALT, _FIT_SAMPLE_SALT = 0x5EED1, 0x5EED2

#: Embeddings, attribute labels and task labels (or None) of some rows.
Rows = tuple[NDArray[np.floating], NDArray[Any], NDArray[Any] | None]


@dataclass(frozen=True, eq=False)
class PartResult:
    """What one partition (or a merge of consecutive ones) contributes: fitting moments, counts and samples.

    ``held_context`` holds the context values of ``held_sample``'s rows, part by part, when the sample has a
    context (``--given``): the audit then also reads the attribute within each value.
    """

    moments: MomentState | None
    fit_rows: int
    held_sample: list[Rows]
    fit_sample: list[Rows]
    held_context: list[NDArray[Any]] = field(default_factory=list)
    #: The context values of the fitting sample's rows, part by part (empty for a sample read without a context).
    fit_context: list[NDArray[Any]] = field(default_factory=list)
    #: The group of each row of ``held_sample`` and of ``fit_sample``, part by part (empty without ``--group``).
    held_group: list[NDArray[Any]] = field(default_factory=list)
    fit_group: list[NDArray[Any]] = field(default_factory=list)

    @classmethod
    def empty(cls) -> PartResult:
        return cls(moments=None, fit_rows=0, held_sample=[], fit_sample=[])

    def with_attribute_dtype(self, dtype: np.dtype[Any]) -> PartResult:
        """The same result with its samples' attribute tables viewed as ``dtype`` again.

        Dask's serialisation of results drops a structured dtype's metadata,
        where an attribute table records which attributes are continuous; the
        fields and their bytes arrive intact.
        """

        def restored(parts: list[Rows]) -> list[Rows]:
            return [(x, z.view(dtype), task) for x, z, task in parts]

        return PartResult(
            self.moments,
            self.fit_rows,
            restored(self.held_sample),
            restored(self.fit_sample),
            self.held_context,
            self.fit_context,
            self.held_group,
            self.fit_group,
        )

    def merge(self, later: PartResult) -> PartResult:
        if self.moments is None or later.moments is None:
            moments = self.moments if later.moments is None else later.moments
        else:
            moments = self.moments.merge(later.moments)
        return PartResult(
            moments=moments,
            fit_rows=self.fit_rows + later.fit_rows,
            held_sample=self.held_sample + later.held_sample,
            fit_sample=self.fit_sample + later.fit_sample,
            held_context=self.held_context + later.held_context,
            fit_context=self.fit_context + later.fit_context,
            held_group=self.held_group + later.held_group,
            fit_group=self.fit_group + later.fit_group,
        )


@dataclass(frozen=True)
class PassPlan:
    """How a partition is split and sampled; the same on every worker.

    Attributes
    ----------
    holdout : float
        Share of rows held out for the audit.
    seed : int
    held_fraction, fit_fraction : float
        Shares of the held-out and of the fitting rows drawn into the samples (1: all of them).
    exact_moments : bool
        Accumulate the fitting rows' moments.
    by_class : bool
        With the per-class co-moments too (a method that reads class covariances).
    whole : bool
        The sample is one partition: the split of a small sample may then be
        repaired so every class has rows on both sides, which a stream
        cannot do (see :func:`veil.samples.splitting.give_every_class_both_parts`).
    """

    holdout: float
    seed: int
    held_fraction: float
    fit_fraction: float
    exact_moments: bool
    whole: bool
    by_class: bool = False

    def split(self, chunk: Chunk) -> NDArray[np.bool_]:
        """The held-out rows of ``chunk``: by row, or by group when the chunk carries one (whole groups)."""
        if chunk.group is not None:
            held = held_out_groups(chunk.group, fraction=self.holdout, seed=self.seed)
            if self.whole:
                held = give_every_class_both_groups(held, split_strata(chunk.attribute), chunk.group)
            return held
        held = held_out_rows(chunk.index, fraction=self.holdout, seed=self.seed)
        if self.whole:
            held = give_every_class_both_parts(held, split_strata(chunk.attribute))
        return held

    def process(self, chunk: Chunk, held: NDArray[np.bool_]) -> PartResult:
        """The contribution of ``chunk``, whose held-out rows are ``held``."""
        fit = ~held
        moments = None
        if self.exact_moments and fit.any():
            x_fit, z_fit = chunk.embeddings[fit], chunk.attribute[fit]
            moments = MomentState.from_batch(
                x_fit,
                encode_attribute(z_fit, x_fit.shape[0], require_categorical=not is_table(z_fit)),
                by_class=self.by_class,
                # With contexts, the moments within each of their values too (merged like the rest, by value).
                given={key: values[fit] for key, values in chunk.contexts.items()} or None,
            )
        held_kept = _kept(chunk, held, self.held_fraction, self.seed ^ _HELD_SAMPLE_SALT)
        held_rows = _rows(chunk, held_kept)
        fit_drawn = _kept(chunk, fit, self.fit_fraction, self.seed ^ _FIT_SAMPLE_SALT)
        fit_rows = _rows(chunk, fit_drawn)
        # The audit reads within the first context column (the first --given), and the methods that fit on rows
        # within a context (transport --given, one column) need each drawn row's value of it.
        first = next(iter(chunk.contexts.values()), None)
        context = [] if first is None or not held_kept.any() else [first[held_kept]]
        fit_context = [] if first is None or not fit_drawn.any() else [first[fit_drawn]]
        group = chunk.group
        return PartResult(
            moments=moments,
            fit_rows=int(np.count_nonzero(fit)),
            held_sample=[held_rows] if held_rows[0].shape[0] else [],
            fit_sample=[fit_rows] if fit_rows[0].shape[0] else [],
            held_context=context,
            fit_context=fit_context,
            held_group=[] if group is None or not held_kept.any() else [group[held_kept]],
            fit_group=[] if group is None or not fit_drawn.any() else [group[fit_drawn]],
        )

    def process_partition(self, partition: Partition) -> PartResult:
        """Load ``partition`` and process it: one task of a distributed pass."""
        chunk = partition.load()
        return self.process(chunk, self.split(chunk))


def _kept(chunk: Chunk, side: NDArray[np.bool_], fraction: float, seed: int) -> NDArray[np.bool_]:
    """The rows of one side of the split that a hash draws with probability ``fraction``."""
    keep = side.copy()
    if fraction < 1.0:
        keep &= held_out_rows(chunk.index, fraction=fraction, seed=seed)
    return keep


def _rows(chunk: Chunk, keep: NDArray[np.bool_]) -> Rows:
    task = None if chunk.task is None else chunk.task[keep]
    return chunk.embeddings[keep], chunk.attribute[keep], task


def concatenated(parts: list[Rows], what: str) -> Rows:
    """The rows of a sample's parts, in order; refuses a sample with no rows."""
    if not parts:
        raise DataError(f"no rows were drawn for the {what}; the sample is too small")
    if len(parts) == 1:
        return parts[0]
    tasks = [t for _, _, t in parts]
    return (
        np.concatenate([x for x, _, _ in parts]),
        np.concatenate([z for _, z, _ in parts]),
        None if tasks[0] is None else np.concatenate([t for t in tasks if t is not None]),
    )
