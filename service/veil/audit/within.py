"""Measure the audit within a context: every reader trained and tested among rows of one context value.

The readers are built by the same factories as the population's
(:func:`veil.audit.readers.build_probe`), sized for each value's folds, so
whatever the population readers see (their scaling, their sizes) they see
here too.  Every row is predicted by a reader trained on the other folds of
its own value: the cross-validation never mixes values, so nothing the
context alone tells about the attribute can be read across values.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from veil.audit import geometry, probes, readers
from veil.audit.context_report import ContextAudit, ContextValue, SkippedValue
from veil.audit.report import PROBES, ProbeScore
from veil.audit.stats import wilson_interval
from veil.maps.attribute import indexed_column
from veil.progress import phase

NEIGHBOURS = 10
#: Rows each class present in a value needs for stratified cross-validation within it (as the population's).
MIN_CLASS_ROWS = 2


def context_groups(given: object, n_rows: int) -> tuple[NDArray[np.generic], NDArray[np.intp]]:
    """The context's sorted values and each row's index among them; ``ValueError`` naming what is wrong."""
    return indexed_column(given, n_rows, column="the context", what="context values")


def skip_reason(codes: NDArray[np.intp], classes: tuple[str, ...]) -> str | None:
    """Why the readers cannot be cross-validated within a value of these class codes (None: they can)."""
    present, counts = np.unique(codes, return_counts=True)
    if present.size < 2:
        return f"every row has class {classes[int(present[0])]!r}: the context alone tells the attribute there"
    if counts.min() < MIN_CLASS_ROWS:
        rare = classes[int(present[np.argmin(counts)])]
        return f"class {rare!r} has {int(counts.min())} row(s) there; cross-validation needs {MIN_CLASS_ROWS}"
    return None


def pooled_score(codes: NDArray[np.intp], predicted: NDArray[np.intp], floor: float) -> ProbeScore:
    """Accuracy with its Wilson interval over rows pooled from several values, against the ``floor``.

    The balanced accuracy is the mean recall of the classes present; per-class recall is not kept (its chance
    level within a context is not one number).
    """
    right = predicted == codes
    present = np.unique(codes)
    hits = int(np.count_nonzero(right))
    low, high = wilson_interval(hits, codes.size)
    return ProbeScore(
        accuracy=hits / codes.size,
        balanced_accuracy=float(np.mean([right[codes == c].mean() for c in present])),
        majority=floor,
        interval_low=low,
        interval_high=high,
        n=int(codes.size),
    )


def _cross_validated(
    name: str,
    x: NDArray[np.floating],
    codes: NDArray[np.intp],
    *,
    folds: int,
    random_state: int,
    groups: NDArray[np.intp] | None = None,
) -> NDArray[np.intp]:
    """Held-out predictions of reader ``name`` within one value (codes compact: ``0 .. classes - 1``).

    With ``groups``, each group of the value stays in one fold.
    """
    sizes = readers.fold_sizes(codes, folds, groups=groups, random_state=random_state)
    model = readers.build_probe(name, random_state, sizes=sizes, features=x.shape[1])
    return probes.cross_val_labels(model, x, codes, folds=folds, random_state=random_state, groups=groups)


def group_skip_reason(codes: NDArray[np.intp], groups: NDArray[np.intp], classes: tuple[str, ...]) -> str | None:
    """Why the readers cannot keep each group in one fold within a value (None: they can)."""
    present = np.unique(codes)
    for c in present:
        carriers = np.unique(groups[codes == c]).size
        if carriers < 2:
            return f"class {classes[int(c)]!r} is carried by {carriers} group there; group folds need 2 or more"
    return None


def _majority_rows(codes: NDArray[np.intp]) -> int:
    return int(np.bincount(codes).max())


def _neighbour_shares(
    raw: NDArray[np.floating], erased: NDArray[np.floating], codes: NDArray[np.intp]
) -> tuple[float, float, float] | None:
    """Within one value: the neighbour attribute share raw and erased, and its base rate (None: too few rows)."""
    k = min(NEIGHBOURS, codes.size - 1)
    if k < 1:
        return None
    before, after = (geometry.neighbour_label_share(geometry.nearest_neighbours(x, k), codes) for x in (raw, erased))
    return before, after, geometry.label_base_rate(codes)


def context_audit(
    raw: NDArray[np.floating],
    erased: NDArray[np.floating],
    codes: NDArray[np.intp],
    given: object,
    *,
    classes: tuple[str, ...],
    column: str | None,
    folds: int,
    nonlinear: bool,
    random_state: int,
    groups: NDArray[np.intp] | None = None,
) -> ContextAudit:
    """Every reader within each value of ``given``, before and after erasure, pooled by rows against the floor.

    Parameters
    ----------
    raw, erased : ndarray of shape (n, d)
        Held-out (or fresh) rows, before and after the map.
    codes : ndarray of shape (n,)
        Attribute class codes, ``0 .. len(classes) - 1``.
    given : array-like of shape (n,)
        Each row's context value.
    classes : tuple of str
        The attribute's class names (for the skipped values' reasons).
    column : str or None
        The context column's name, for the report.
    folds : int
        At most this many folds within each value (fewer for a value whose smallest class has fewer rows).
    nonlinear : bool
        Every reader of :data:`~veil.audit.report.PROBES`, or the linear one only.
    random_state : int
    groups : ndarray of shape (n,), optional
        Each row's group index: within each value, every group stays in one fold (a value whose classes are not
        each carried by two groups there is skipped, with the reason).

    Returns
    -------
    ContextAudit
    """
    values, value_of_row = context_groups(given, codes.size)
    names = PROBES if nonlinear else ("linear",)
    read: list[ContextValue] = []
    skipped: list[SkippedValue] = []
    pooled_rows: list[NDArray[np.intp]] = []
    predicted: dict[tuple[str, str], NDArray[np.intp]] = {}
    neighbours: list[tuple[int, tuple[float, float, float]]] = []
    for g, value in enumerate(values):
        rows = np.flatnonzero(value_of_row == g)
        reason = skip_reason(codes[rows], classes)
        value_groups = None if groups is None else groups[rows]
        if reason is None and value_groups is not None:
            reason = group_skip_reason(codes[rows], value_groups, classes)
        if reason is not None:
            skipped.append(SkippedValue(str(value), int(rows.size), reason))
            continue
        with phase(f"auditing within {value}"):
            one, guesses = _one_value(
                raw[rows], erased[rows], codes[rows], str(value), names, folds, random_state, value_groups
            )
        read.append(one)
        pooled_rows.append(rows)
        for key, guess in guesses.items():
            predicted.setdefault(key, np.empty(codes.size, dtype=np.intp))[rows] = guess
        shares = _neighbour_shares(raw[rows], erased[rows], codes[rows])
        if shares is not None:
            neighbours.append((int(rows.size), shares))
    return _pooled(read, skipped, pooled_rows, predicted, neighbours, codes, names, column)


def _one_value(
    raw: NDArray[np.floating],
    erased: NDArray[np.floating],
    codes: NDArray[np.intp],
    value: str,
    names: tuple[str, ...],
    folds: int,
    random_state: int,
    groups: NDArray[np.intp] | None = None,
) -> tuple[ContextValue, dict[tuple[str, str], NDArray[np.intp]]]:
    """Every reader within one value: its figures, and the predictions (the audit's class codes) by reader and side."""
    present, compact = np.unique(codes, return_inverse=True)
    compact = compact.astype(np.intp)
    value_folds = probes.probe_folds(compact, folds) if groups is None else probes.group_folds(compact, groups, folds)
    floor = _majority_rows(compact) / compact.size
    scores: dict[str, dict[str, ProbeScore]] = {"before": {}, "after": {}}
    guesses: dict[tuple[str, str], NDArray[np.intp]] = {}
    for name in names:
        for side, x in (("before", raw), ("after", erased)):
            guess = _cross_validated(name, x, compact, folds=value_folds, random_state=random_state, groups=groups)
            scores[side][name] = pooled_score(compact, guess, floor)
            guesses[name, side] = present[guess].astype(np.intp)
    return ContextValue(value, int(codes.size), floor, scores["before"], scores["after"]), guesses


def _pooled(
    read: list[ContextValue],
    skipped: list[SkippedValue],
    pooled_rows: list[NDArray[np.intp]],
    predicted: dict[tuple[str, str], NDArray[np.intp]],
    neighbours: list[tuple[int, tuple[float, float, float]]],
    codes: NDArray[np.intp],
    names: tuple[str, ...],
    column: str | None,
) -> ContextAudit:
    """The values' figures pooled by rows: each reader's score over every row read, and the floor."""
    if not read:
        return ContextAudit(column, 0, 0.0, {}, {}, (), tuple(skipped))
    rows = np.concatenate(pooled_rows)
    # Counts, not shares, are summed: the floor is exactly the values' majority rows over the rows read.
    floor = sum(_majority_rows(codes[value_rows]) for value_rows in pooled_rows) / rows.size
    before = {name: pooled_score(codes[rows], predicted[name, "before"][rows], floor) for name in names}
    after = {name: pooled_score(codes[rows], predicted[name, "after"][rows], floor) for name in names}
    weights = np.array([n for n, _ in neighbours], dtype=np.float64)
    nn = [float(np.average([s[i] for _, s in neighbours], weights=weights)) if neighbours else None for i in range(3)]
    return ContextAudit(
        column, int(rows.size), floor, before, after, tuple(read), tuple(skipped),
        nn_share_before=nn[0], nn_share_after=nn[1], nn_base_rate=nn[2],
    )  # fmt: skip
