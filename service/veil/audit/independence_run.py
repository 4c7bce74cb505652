"""The family of independence tests an audit runs on its erased rows, with power, at a fast or thorough setting."""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, replace

import numpy as np
from numpy.typing import NDArray

from veil.audit.independence import (
    ALPHA,
    ROWS,
    corrected,
    group_grouping,
    kernel_test,
    neighbour_test,
    reader_test,
)
from veil.audit.independence_report import IndependenceAudit
from veil.audit.power import DRAW_SHARE, FitPredict, NeighbourRun, PowerSettings, reader_run, smallest_strengths
from veil.audit.scores import ProbeScore


@dataclass(frozen=True)
class IndependenceSettings:
    """Permutations behind each p-value, and the power measured (None: not measured)."""

    permutations: int
    power: PowerSettings | None
    thorough: bool


#: ``veil fit`` and ``veil audit`` by default (measured times in docs/independence.md).
FAST = IndependenceSettings(
    permutations=200,
    power=PowerSettings(grid=(0.1, 0.25, 0.5, 1.0), draws=10, permutations=100, readers=False),
    thorough=False,
)
#: ``--thorough``: finer p-values, a finer grid and more draws.
THOROUGH = IndependenceSettings(
    permutations=1000,
    power=PowerSettings(
        grid=(0.05, 0.1, 0.15, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.85, 1.0), draws=40, permutations=200, readers=True
    ),
    thorough=True,
)


def settings_for(thorough: bool) -> IndependenceSettings:
    return THOROUGH if thorough else FAST


@dataclass(frozen=True)
class ReaderEvidence:
    """The strongest reader after erasure: its name, its held-out predictions, the rows of the fold its test reads,
    every reader's score, and how to refit it on other rows (held-out predictions of rows), for power."""

    name: str
    #: Held-out predictions, shape (readers, n): the named reader's first, then every other reader's.
    predicted: NDArray[np.intp]
    rows: NDArray[np.intp]
    scores: Mapping[str, ProbeScore]
    fit_predict: FitPredict


def independence_audit(
    raw: NDArray[np.floating],
    erased: NDArray[np.floating],
    codes: NDArray[np.intp],
    *,
    neighbours: NDArray[np.intp],
    find_neighbours: NeighbourRun,
    reader: ReaderEvidence | None,
    settings: IndependenceSettings,
    seed: int,
    alpha: float = ALPHA,
    groups: NDArray[np.intp] | None = None,
    grouped: NDArray[np.intp] | None = None,
) -> IndependenceAudit:
    """Run the family on the erased rows, correct it (Holm), and measure each test's power on planted rows.

    Parameters
    ----------
    raw, erased : ndarray of shape (n, d)
        The audited rows before and after the map (the power plants between them).
    codes : ndarray of shape (n,)
        The attribute's class of each row.
    neighbours : ndarray of shape (n, k)
        Each erased row's nearest neighbours (the audit's own).
    find_neighbours : callable
        Finds them for other rows (power), ``(rows, groups to keep apart or None)``.
    reader : ReaderEvidence, optional
        The strongest reader; None leaves the readers' test out.
    groups : ndarray of shape (n,), optional
        Each row's context value: the kernel and neighbour tests also run within the context (labels permuted
        within each value), in the same family.  Their power is not measured.
    grouped : ndarray of shape (n,), optional
        Each row's group of the ``--group`` column: the kernel, readers' and neighbour tests permute labels as
        :func:`veil.audit.independence.group_grouping` allows (whole groups, or within each group), the neighbours
        come from other groups, and power draws whole groups (``reader.rows`` is then a group fold).
    """
    rng = np.random.default_rng(seed)
    permutations = settings.permutations
    grouping = ROWS if grouped is None else group_grouping(codes, grouped)
    outcomes = [kernel_test(erased, codes, permutations=permutations, rng=rng, alpha=alpha, grouping=grouping)]
    across = _neighbours_apart(erased, neighbours, grouping.apart, find_neighbours)
    if across is not None:
        outcomes.append(
            neighbour_test(across, codes, permutations=permutations, rng=rng, alpha=alpha, grouping=grouping)
        )
    if reader is not None:
        outcomes.insert(
            1,
            reader_test(
                reader.predicted,
                codes,
                reader.scores,
                reader.name,
                rows=reader.rows,
                permutations=permutations,
                rng=rng,
                alpha=alpha,
                grouping=grouping,
            ),
        )
    # With a group column as well, the tests within the context are left out: they permute row by row within each
    # value, and rows of one group share both their position and their label, so their null would be wrong.
    if groups is not None and grouped is None:
        outcomes.append(kernel_test(erased, codes, permutations=permutations, rng=rng, alpha=alpha, groups=groups))
        within = _neighbours_within(erased, groups, find_neighbours)
        if within is not None:
            queries, found = within
            outcomes.append(
                neighbour_test(
                    found, codes, permutations=permutations, rng=rng, alpha=alpha, queries=queries, groups=groups
                )
            )
    tests = corrected(outcomes)
    power = settings.power
    if power is None or not _can_draw(codes, grouping.apart):
        return IndependenceAudit(tests, alpha, permutations, settings.thorough, seed=seed)
    result = smallest_strengths(
        raw, erased, codes, neighbours=find_neighbours,
        reader=None if reader is None else reader_run(reader.fit_predict, reader.name),
        settings=power, rng=rng, alpha=alpha, grouping=grouping,
    )  # fmt: skip
    tests = tuple(
        replace(test, smallest_strength=result.smallest.get(test.name), power_measured=test.name in result.smallest)
        for test in tests
    )
    return IndependenceAudit(
        tests, alpha, permutations, settings.thorough, power_grid=power.grid, power_draws=power.draws,
        power_rows=result.rows, seed=seed,
    )  # fmt: skip


def _neighbours_apart(
    x: NDArray[np.floating],
    neighbours: NDArray[np.intp],
    apart: NDArray[np.intp] | None,
    find_neighbours: NeighbourRun,
) -> NDArray[np.intp] | None:
    """The audit's neighbours, or with a group column each row's neighbours among other groups' rows (None: too
    few rows outside some group, and the test is left out)."""
    if apart is None:
        return neighbours
    try:
        return find_neighbours(x, apart)
    except ValueError:
        return None


def _neighbours_within(
    x: NDArray[np.floating],
    groups: NDArray[np.intp],
    find_neighbours: NeighbourRun,
) -> tuple[NDArray[np.intp], NDArray[np.intp]] | None:
    """Each row's neighbours among the rows of its own context value, as indices of all rows, and those rows.

    Values with too few rows for every neighbour are left out (None: no value has enough).
    """
    queries, found = [], []
    for group in np.unique(groups):
        members = np.flatnonzero(groups == group)
        try:
            neighbours = find_neighbours(x[members], None)
        except ValueError:
            continue  # fewer rows than neighbours in this value
        queries.append(members)
        found.append(members[neighbours])
    if not queries:
        return None
    return np.concatenate(queries), np.concatenate(found)


#: Power is measured where a draw holds at least this many rows, and each class in it enough for the readers'
#: folds: a handful of rows has no 10 neighbours to count and no folds to cross-validate.
MIN_DRAW_ROWS = 40
MIN_DRAW_CLASS_ROWS = 5


#: With a group column, each class carried by at least this many groups: a draw takes a quarter of them, and its
#: readers' group folds need every class in at least 2 groups.
MIN_CLASS_GROUPS = 8
#: With a group column, a draw's groups must have at least this many distinct labellings: a group-level
#: permutation p-value is at least about one over their number, so with fewer no draw could reach a small level
#: (on the committed sample's 20 judged names a draw holds 5: 10 labellings, p never below 0.05, every strength
#: "missed"; not measured is the honest figure).
MIN_DRAW_LABELLINGS = 100


def _can_draw(codes: NDArray[np.intp], groups: NDArray[np.intp] | None = None) -> bool:
    """Whether a power draw of these rows (of whole groups, with ``groups``) is large enough to run every test."""
    smallest = int(np.bincount(codes).min())
    enough = codes.size * DRAW_SHARE >= MIN_DRAW_ROWS and smallest * DRAW_SHARE >= MIN_DRAW_CLASS_ROWS
    if groups is None or not enough:
        return enough
    carriers = [np.unique(groups[codes == c]).size for c in np.unique(codes)]
    drawn = [int(np.floor(count * DRAW_SHARE)) for count in carriers]
    labellings = math.factorial(sum(drawn)) // math.prod(math.factorial(count) for count in drawn)
    return min(carriers) >= MIN_CLASS_GROUPS and labellings >= MIN_DRAW_LABELLINGS
