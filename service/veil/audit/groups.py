"""Measure the readers across groups: the linear reader on ordinary and group folds, and the transfer reader.

The audit's readers run on group folds when the audited rows carry a group
(:func:`veil.audit.probes.fold_splitter`); this module adds what the report
sets beside them (:class:`~veil.audit.group_report.GroupAudit`): the linear
reader on ordinary folds, to show how much the recurring groups lent it, and
the transfer reader, trained on the cleaned fitting rows and tested on the
cleaned audited rows.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray
from sklearn.base import clone
from sklearn.exceptions import ConvergenceWarning
from sklearn.model_selection import train_test_split
from threadpoolctl import threadpool_limits

from veil.audit import probes, readers
from veil.audit.group_report import GroupAudit
from veil.audit.scores import ProbeScore
from veil.maps.attribute import indexed_column

#: The nonlinear transfer reader learns from at most this many fitting rows (a stratified, seeded draw): one
#: fit of it costs what one fold of the audit's costs.  The linear transfer reader learns from every row given.
TRANSFER_NONLINEAR_ROWS = 4000


def group_codes(values: object, n_rows: int) -> tuple[NDArray[np.generic], NDArray[np.intp]]:
    """The groups' sorted values and each row's index among them; ``ValueError`` naming what is wrong."""
    return indexed_column(values, n_rows, column="the group column", what="group values")


def group_fold_problem(labels: NDArray[Any], groups: NDArray[Any]) -> str | None:
    """Why the readers cannot keep each group in one fold on these rows, naming the class (None: they can)."""
    classes, codes = np.unique(np.asarray(labels).astype(str), return_inverse=True)
    _, index = group_codes(groups, codes.size)
    for code, label in enumerate(classes):
        carriers = np.unique(index[codes.reshape(-1) == code]).size
        if carriers < 2:
            return (
                f"class {str(label)!r} is carried by {carriers} group of the audited rows; group folds need every "
                "class in at least 2 groups (more groups, a larger held-out share, or no group column)"
            )
    return None


@dataclass(frozen=True)
class FittingRows:
    """The rows the eraser was fitted on (or a sample of them), for the transfer reader.

    ``labels`` are the attribute's class labels; ``groups`` each row's group (None: not known).
    """

    x: NDArray[np.floating]
    labels: NDArray[Any]
    groups: NDArray[Any] | None = None


def transfer_score(
    model: Any, x_train: NDArray[np.floating], y_train: NDArray[np.intp], x_test: NDArray[np.floating],
    y_test: NDArray[np.intp],
) -> ProbeScore:  # fmt: skip
    """``model`` fitted once on the training rows and scored on every test row (codes ``0 .. classes - 1``)."""
    with warnings.catch_warnings(), threadpool_limits(limits=1):
        warnings.simplefilter("ignore", ConvergenceWarning)
        predicted = np.asarray(clone(model).fit(x_train, y_train).predict(x_test))
    return probes.score_predictions(y_test, predicted.astype(np.intp))


def group_audit(
    raw: NDArray[np.floating],
    erased: NDArray[np.floating],
    codes: NDArray[np.intp],
    labels: NDArray[Any],
    groups: NDArray[Any],
    *,
    column: str | None,
    grouped: tuple[ProbeScore, ProbeScore],
    strongest: str | None,
    fitting: FittingRows | None,
    apply: Callable[[NDArray[np.floating]], NDArray[np.floating]],
    folds: int,
    random_state: int,
) -> GroupAudit:
    """The section across groups of an audit whose readers ran on group folds.

    Parameters
    ----------
    raw, erased : ndarray of shape (n, d)
        The audited rows before and after the map.
    codes : ndarray of shape (n,)
        Their class codes; ``labels[codes]`` are their class labels.
    groups : ndarray of shape (n,)
        Each audited row's group.
    grouped : (ProbeScore, ProbeScore)
        The linear reader on group folds, before and after (the audit's own linear figures).
    strongest : str or None
        The nonlinear reader strongest on group folds after erasure, read as a transfer reader too (None: none).
    fitting : FittingRows or None
        The fitting rows (None: no transfer reader, as for a fresh sample).
    apply : callable
        The map, as served.
    """
    _, group_index = group_codes(groups, codes.size)
    ordinary_folds = probes.probe_folds(codes, folds)
    linear = probes.linear_probe(random_state)
    ordinary_before, ordinary_after = (
        probes.classification_score(linear, x, codes, folds=folds, random_state=random_state) for x in (raw, erased)
    )
    values: dict[str, Any] = {}
    if fitting is None:
        values["note"] = "transfer not read: no fitting rows are at hand (a fresh sample is audited on its own)"
    else:
        values.update(_transfer(raw, erased, codes, labels, groups, fitting, apply, strongest, random_state))
    return GroupAudit(
        column=column,
        groups=int(group_index.max()) + 1,
        folds=probes.group_folds(codes, group_index, folds),
        ordinary_folds=ordinary_folds,
        ordinary_before=ordinary_before,
        ordinary_after=ordinary_after,
        grouped_before=grouped[0],
        grouped_after=grouped[1],
        **values,
    )


def _transfer(
    raw: NDArray[np.floating],
    erased: NDArray[np.floating],
    codes: NDArray[np.intp],
    labels: NDArray[Any],
    groups: NDArray[Any],
    fitting: FittingRows,
    apply: Callable[[NDArray[np.floating]], NDArray[np.floating]],
    strongest: str | None,
    random_state: int,
) -> dict[str, Any]:
    """The transfer readers' figures (the fitting rows of classes the audited rows lack are left out)."""
    # Matched by text: the audited labels' order (their codes) need not be the text's order (9 < 10 < "9").
    lookup = {str(label): code for code, label in enumerate(np.asarray(labels).tolist())}
    fit_labels = np.asarray(fitting.labels).astype(str)
    known = np.isin(fit_labels, list(lookup))
    fit_codes = np.array([lookup[label] for label in fit_labels[known].tolist()], dtype=np.intp)
    values: dict[str, Any] = {}
    if fitting.groups is not None:
        fit_groups = np.asarray(fitting.groups).astype(str)
        values["fit_groups"] = int(np.unique(fit_groups).size)
        values["shared_groups"] = int(np.intersect1d(fit_groups, np.asarray(groups).astype(str)).size)
    if np.unique(fit_codes).size < 2:
        values["note"] = "transfer not read: the fitting rows at hand hold fewer than two of the audited classes"
        return values
    x_fit = np.asarray(fitting.x)[known]
    x_fit_erased = apply(x_fit)
    linear = probes.linear_probe(random_state)
    values["transfer_before"] = transfer_score(linear, x_fit, fit_codes, raw, codes)
    values["transfer_after"] = transfer_score(linear, x_fit_erased, fit_codes, erased, codes)
    if strongest is not None and strongest != "linear":
        rows = _capped(fit_codes, random_state)
        trained = fit_codes[rows]
        counts = np.bincount(trained)
        sizes = readers.FoldSizes(rows=int(rows.size), smallest_class=int(counts.min()), classes=int(counts.size))
        model = readers.build_probe(strongest, random_state, sizes=sizes, features=raw.shape[1])
        values["transfer_reader"] = strongest
        values["transfer_reader_before"] = transfer_score(model, x_fit[rows], trained, raw, codes)
        values["transfer_reader_after"] = transfer_score(model, x_fit_erased[rows], trained, erased, codes)
    return values


def _capped(codes: NDArray[np.intp], random_state: int) -> NDArray[np.intp]:
    """At most :data:`TRANSFER_NONLINEAR_ROWS` of the rows, a stratified seeded draw (all of them when fewer)."""
    rows = np.arange(codes.size)
    if rows.size <= TRANSFER_NONLINEAR_ROWS:
        return rows
    drawn = train_test_split(rows, train_size=TRANSFER_NONLINEAR_ROWS, stratify=codes, random_state=random_state)[0]
    return np.sort(np.asarray(drawn, dtype=np.intp))
