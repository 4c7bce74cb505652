"""The power of the independence tests: the smallest leak planted back into the erased rows each one detects.

With ``f`` the map, ``x_t = f(x) + t (x - f(x))`` puts back a share ``t`` of
what the map removed from each row (``t = 0``: the erased rows, ``t = 1``:
the raw ones).  For each strength of a grid, ascending, each draw takes a
random part of the rows (stratified by class), plants them at ``t`` and runs
every test at level ``alpha``, uncorrected; a test's smallest strength is the
first whose share of draws detected reaches :data:`SHARE`.

Each draw takes :data:`DRAW_SHARE` of the rows (stratified by class), so the
figure is the power of a sample that size: what the whole sample detects is
at most that strength.  Draws of one sample overlap, so they vary less than
fresh samples would; a quarter rather than a half keeps that small (with
halves, a strength reported detected in 80% of draws was detected in 43% of
fresh samples of a draw's size in the planted test of tests/test_independence.py).

With a group column a draw takes whole groups (a quarter of them, stratified
by each group's class) and every test in it treats the groups as the audit's
own tests do (:class:`veil.audit.independence.Grouping`): a leak planted into
a draw of rows cut through groups would be judged against the wrong null.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from sklearn.model_selection import train_test_split

from veil.audit.independence import ALPHA, ROWS, Grouping, Outcome, kernel_test, neighbour_test, reader_test

#: The share of draws a strength must be detected in.
SHARE = 0.8
#: The share of the rows in each draw.
DRAW_SHARE = 0.25

#: Runs one reader's test on planted rows: ``(rows, codes, grouping, permutations, rng) -> Outcome``.
ReaderRun = Callable[[NDArray[np.floating], NDArray[np.intp], Grouping, int, np.random.Generator], Outcome]
#: The neighbours of each row: ``(rows, groups to keep apart or None) -> indices of shape (n, k)``.
NeighbourRun = Callable[[NDArray[np.floating], NDArray[np.intp] | None], NDArray[np.intp]]


@dataclass(frozen=True)
class PowerSettings:
    """The grid of strengths, the draws at each, the permutations behind each draw's p-values, and whether the
    readers' test is measured too (it refits the reader on every draw: the costliest part by far)."""

    grid: tuple[float, ...]
    draws: int
    permutations: int
    readers: bool


@dataclass(frozen=True)
class PowerResult:
    """Each test's smallest strength detected (None: none of the grid; absent: not measured), the rows per draw."""

    smallest: dict[str, float | None]
    rows: int


def planted(raw: NDArray[np.floating], erased: NDArray[np.floating], strength: float) -> NDArray[np.float64]:
    """``f(x) + t (x - f(x))``: the share ``t`` of what the map removed put back."""
    cleaned = np.asarray(erased, dtype=np.float64)
    return cleaned + strength * (np.asarray(raw, dtype=np.float64) - cleaned)


def draw(codes: NDArray[np.intp], rng: np.random.Generator, groups: NDArray[np.intp] | None = None) -> NDArray[np.intp]:
    """:data:`DRAW_SHARE` of the rows at random, stratified by class, in increasing order.

    With ``groups`` (each row's group), :data:`DRAW_SHARE` of the groups, stratified by a class of each (its only
    one where the attribute is constant within groups), and all their rows.
    """
    seed = int(rng.integers(2**31 - 1))
    if groups is None:
        chosen = train_test_split(np.arange(codes.size), train_size=DRAW_SHARE, stratify=codes, random_state=seed)[0]
        return np.sort(np.asarray(chosen, dtype=np.intp))
    present, index = np.unique(groups, return_inverse=True)
    index = index.reshape(-1)
    label = np.empty(present.size, dtype=np.intp)
    label[index] = codes
    taken = train_test_split(np.arange(present.size), train_size=DRAW_SHARE, stratify=label, random_state=seed)[0]
    return np.flatnonzero(np.isin(index, taken)).astype(np.intp)


def smallest_strengths(
    raw: NDArray[np.floating],
    erased: NDArray[np.floating],
    codes: NDArray[np.intp],
    *,
    neighbours: NeighbourRun,
    reader: ReaderRun | None,
    settings: PowerSettings,
    rng: np.random.Generator,
    alpha: float = ALPHA,
    grouping: Grouping = ROWS,
) -> PowerResult:
    """The smallest strength of ``settings.grid`` each test detects in :data:`SHARE` of the draws.

    A test detected at a strength is not run at the larger ones (planting more of the same leak does not hide
    it), and a test stops drawing at a strength once its outcome there is settled (enough draws detected, or
    too many missed to reach the share).  ``reader=None`` or ``settings.readers`` false leaves the readers' test
    out.  With ``grouping`` (a group column) each draw takes whole groups and its tests treat them as it says.
    """
    groups = grouping.apart
    names = ["kernel", "neighbours"] + ([] if reader is None or not settings.readers else ["readers"])
    smallest: dict[str, float | None] = dict.fromkeys(names)
    needed = int(np.ceil(SHARE * settings.draws))
    rows = 0
    for strength in settings.grid:
        detected = {name: 0 for name in names if smallest[name] is None}
        missed = dict.fromkeys(detected, 0)
        for _ in range(settings.draws):
            open_ = [name for name in detected if detected[name] < needed and missed[name] <= settings.draws - needed]
            if not open_:
                break
            chosen = draw(codes, rng, groups)
            rows = chosen.size
            x = planted(raw[chosen], erased[chosen], strength)
            drawn = grouping.take(chosen)
            for name in open_:
                outcome = _run(name, x, codes[chosen], drawn, neighbours, reader, settings.permutations, rng)
                hit = outcome.p_value < alpha
                detected[name] += hit
                missed[name] += not hit
        for name, count in detected.items():
            if count >= needed:
                smallest[name] = strength
    return PowerResult(smallest, rows)


def _run(
    name: str,
    x: NDArray[np.float64],
    codes: NDArray[np.intp],
    grouping: Grouping,
    neighbours: NeighbourRun,
    reader: ReaderRun | None,
    permutations: int,
    rng: np.random.Generator,
) -> Outcome:
    if name == "kernel":
        return kernel_test(x, codes, permutations=permutations, rng=rng, bootstrap=0, grouping=grouping)
    if name == "neighbours":
        found = neighbours(x, grouping.apart)
        return neighbour_test(found, codes, permutations=permutations, rng=rng, bootstrap=0, grouping=grouping)
    if reader is None:
        raise ValueError("the readers' test needs a reader")
    return reader(x, codes, grouping, permutations, rng)


#: Held-out predictions of rows by a reader: ``(rows, codes, groups or None) -> (each row's prediction, one fold's
#: rows)``; with groups, group folds.
FitPredict = Callable[
    [NDArray[np.floating], NDArray[np.intp], NDArray[np.intp] | None], tuple[NDArray[np.intp], NDArray[np.intp]]
]


def reader_run(fit_predict: FitPredict, name: str) -> ReaderRun:
    """A :data:`ReaderRun` from a function giving held-out predictions of rows (the reader ``name``)."""

    def run(
        x: NDArray[np.floating],
        codes: NDArray[np.intp],
        grouping: Grouping,
        permutations: int,
        rng: np.random.Generator,
    ) -> Outcome:
        predicted, rows = fit_predict(x, codes, grouping.apart)
        return reader_test(predicted, codes, {}, name, rows=rows, permutations=permutations, rng=rng, grouping=grouping)

    return run
