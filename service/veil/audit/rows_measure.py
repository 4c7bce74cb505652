"""Measure the rows a fit needs: refit the method on shares of its fitting rows, read each on the held-out rows.

The records and the curve are in :mod:`veil.audit.rows_curve`.  Each refit is
a clone of the fitted eraser (same method, same options, same seed) fitted on
a nested, stratified, seeded draw of the fitting rows: the 1/8 draw lies
within the 1/4 one, which lies within the 1/2 one, so the curve's points
differ by the rows added and not by a new draw each time.  Each is read by
the audit's own linear reader (:func:`veil.audit.probes.linear_probe`, the
same folds and seed) on the same held-out rows the version's audit read.
"""

from __future__ import annotations

import time
import warnings
from typing import Any

import numpy as np
from numpy.typing import NDArray
from sklearn.base import clone
from sklearn.model_selection import train_test_split

from veil.audit import probes
from veil.audit.report import AuditReport, ProbeScore
from veil.audit.rows_curve import MIN_POINTS, SHARES, LearningCurve, RowsNeeded
from veil.audit.within import context_groups, skip_reason
from veil.erasers._base import Erasure
from veil.progress import advance

#: The progress stage of the refits (one bar: a bar per refit would crowd out the fit's others).
STAGE = "rows needed (refits)"
#: The fewest fitting rows of each class a refit is given (fewer: that share is left out of the curve).
MIN_REFIT_CLASS_ROWS = 5


def nested_shares(codes: NDArray[np.intp], shares: tuple[float, ...], seed: int) -> list[NDArray[np.intp]]:
    """Row indices of each share of the rows, largest share drawn first, each draw within the one before.

    Stratified by ``codes`` (each class keeps its share to within a row) and seeded; increasing order inside
    each draw.  A share whose draw would leave a class fewer than two rows is left out (empty list entry).
    """
    drawn: list[NDArray[np.intp]] = []
    rows = np.arange(codes.size)
    previous = 1.0
    for share in sorted(shares, reverse=True):
        size = round(rows.size * share / previous)
        counts = np.bincount(codes[rows])
        if size < 2 * counts.size or counts[counts > 0].min() < 2 or size >= rows.size:
            drawn.append(np.array([], dtype=np.intp))
            continue
        try:
            kept = train_test_split(rows, train_size=size, stratify=codes[rows], random_state=seed)[0]
        except ValueError:  # too few rows of a class for both sides of a stratified draw
            drawn.append(np.array([], dtype=np.intp))
            continue
        rows = np.sort(kept)
        previous = share
        drawn.append(rows)
    return drawn[::-1]


def _population_excess(score: ProbeScore) -> float:
    return score.accuracy - score.majority


def within_excess(
    erased: NDArray[np.floating], codes: NDArray[np.intp], groups: NDArray[np.intp], *, folds: int, seed: int
) -> float | None:
    """The linear reader within each context value of the erased rows, pooled by rows, minus the floor.

    The same reader, folds and skipping rule as the audit within a context
    (:mod:`veil.audit.within`); None when no value can be cross-validated.
    """
    right = majority = read = 0
    classes = tuple(str(c) for c in range(int(codes.max()) + 1))
    for g in np.unique(groups):
        rows = np.flatnonzero(groups == g)
        if skip_reason(codes[rows], classes) is not None:
            continue
        compact = np.unique(codes[rows], return_inverse=True)[1].astype(np.intp)
        predicted = probes.cross_val_labels(
            probes.linear_probe(seed), erased[rows], compact, folds=probes.probe_folds(compact, folds),
            random_state=seed,
        )  # fmt: skip
        right += int(np.count_nonzero(predicted == compact))
        majority += int(np.bincount(compact).max())
        read += rows.size
    # Counts, not shares, so the floor and the accuracy share one denominator.
    return None if read == 0 else (right - majority) / read


def measure_rows_needed(
    eraser: Erasure,
    x_fit: NDArray[np.floating],
    z_fit: NDArray[Any],
    report: AuditReport,
    x_held: NDArray[np.floating],
    codes_held: NDArray[np.intp],
    *,
    full_rows: int,
    threshold: float,
    folds: int,
    seed: int,
    fit_context: NDArray[Any] | None = None,
    held_context: NDArray[Any] | None = None,
    context_threshold: float | None = None,
) -> RowsNeeded:
    """Refit ``eraser``'s method on shares of the fitting rows and fit the held-out linear excess's curve.

    Parameters
    ----------
    eraser : Erasure
        The version's fitted eraser (cloned for each refit; it is not changed).
    x_fit, z_fit : ndarray
        Fitting rows and their attribute labels (those the eraser was fitted on, or a draw of them).
    report : AuditReport
        The version's audit on ``x_held``: its linear reader after erasure is the last point.
    x_held : ndarray of shape (n_held, d)
    codes_held : ndarray of shape (n_held,)
        The held-out rows and their class codes, as the audit read them.
    full_rows : int
        Rows the version was fitted on (the last point's row count).
    threshold : float
        The card's warn level of the linear threat.
    folds, seed : int
        The audit's folds and seed.
    fit_context, held_context : ndarray, optional
        Context values of the fitting and held-out rows (a ``--given`` fit): the refits are fitted within the
        context and the curve is also measured within it, against the floor, aiming under ``context_threshold``.

    Returns
    -------
    RowsNeeded
    """
    started = time.perf_counter()
    linear = report.leakage.linear_after
    if not isinstance(linear, ProbeScore):
        raise ValueError("the rows-needed curve reads a categorical attribute (class labels)")
    fit_codes = np.unique(z_fit, return_inverse=True)[1].astype(np.intp)
    draws = nested_shares(fit_codes, SHARES, seed)
    by_value = held_context is not None and report.context is not None and report.context.after
    groups = None if not by_value else context_groups(held_context, codes_held.size)[1]
    rows: list[int] = []
    population: list[float] = []
    context: list[float] = []
    for step, drawn in enumerate(draws, start=1):
        advance(STAGE, step - 1, len(draws))
        if drawn.size == 0 or np.bincount(fit_codes[drawn]).min() < MIN_REFIT_CLASS_ROWS:
            continue
        refit = clone(eraser)
        given = {} if fit_context is None else {"given": fit_context[drawn]}
        with warnings.catch_warnings():
            # A refit on fewer rows warns as the fit did (an INLP that stops early): the card has the fit's notes.
            warnings.simplefilter("ignore")
            try:
                refit.fit(x_fit[drawn], z_fit[drawn], **given)
            except ValueError:  # a share the method cannot fit (a context value short of a class) is left out
                continue
        erased = refit.transform(x_held)
        score = probes.classification_score(probes.linear_probe(seed), erased, codes_held, folds=folds,
                                            random_state=seed)  # fmt: skip
        if groups is not None:
            within = within_excess(erased, codes_held, groups, folds=folds, seed=seed)
            if within is None:
                groups = None
            else:
                context.append(within)
        rows.append(int(drawn.size))
        population.append(_population_excess(score))
    advance(STAGE, len(draws), len(draws))
    dim = int(x_held.shape[1])
    if len(rows) + 1 < MIN_POINTS:
        return RowsNeeded(
            dim=dim, heldout=int(codes_held.size), population=None, seconds=time.perf_counter() - started,
            reason=f"too few fitting rows per class to refit on {MIN_POINTS - 1} shares of them",
        )  # fmt: skip
    rows.append(int(full_rows))
    population.append(_population_excess(linear))
    curve = LearningCurve.fitted(tuple(rows), tuple(population), baseline="majority", threshold=threshold)
    within_curve = None
    if groups is not None and report.context is not None and context_threshold is not None:
        full = report.context.after["linear"]
        context.append(full.accuracy - report.context.floor)
        within_curve = LearningCurve.fitted(tuple(rows), tuple(context), baseline="floor", threshold=context_threshold)
    return RowsNeeded(
        dim=dim,
        heldout=int(codes_held.size),
        population=curve,
        context=within_curve,
        context_column=None if within_curve is None or report.context is None else report.context.column,
        seconds=time.perf_counter() - started,
    )
