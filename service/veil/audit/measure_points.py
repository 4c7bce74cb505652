"""Measuring an operating point on held-out rows: what a strength sweep plots and chooses by.

A point is measured like the audit measures a version, with less: each
probe is trained and tested only on the held-out rows (stratified k-fold),
the strongest is the one with the most rows right, and the neighbour shares
and distortion are those of the audit (:mod:`veil.audit.geometry`).  The raw
rows' own figures are measured the same way, so every point can be read
against them.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

from veil.audit import geometry, probes, readers
from veil.audit.points import Baselines, PointFigures
from veil.audit.report import PROBES

NEIGHBOURS = 10


def baselines(codes: NDArray[np.intp], task_codes: NDArray[np.intp] | None) -> Baselines:
    """The baselines of held-out rows with attribute ``codes`` (and ``task_codes``)."""
    return Baselines(
        majority=float(np.bincount(codes).max() / codes.size),
        nn_attribute_base=geometry.label_base_rate(codes),
        nn_task_base=None if task_codes is None else geometry.label_base_rate(task_codes),
    )


def point_figures(
    raw: NDArray[np.floating],
    cleaned: NDArray[np.floating],
    codes: NDArray[np.intp],
    task_codes: NDArray[np.intp] | None,
    *,
    folds: int,
    nonlinear: bool,
    random_state: int,
) -> PointFigures:
    """The figures of ``cleaned`` (the held-out rows after some map; ``raw`` itself for the raw figures).

    Parameters
    ----------
    raw, cleaned : ndarray of shape (n, d)
    codes : ndarray of shape (n,)
        Attribute class of each row.
    task_codes : ndarray of shape (n,) or None
    folds : int
        Cross-validation folds of the probes.
    nonlinear : bool
        Run every probe (otherwise the linear one only, which is then also the strongest).
    random_state : int
    """
    sizes = readers.fold_sizes(codes, folds)
    accuracies: dict[str, float] = {}
    for name in PROBES if nonlinear else ("linear",):
        model = readers.build_probe(name, random_state, sizes=sizes, features=raw.shape[1])
        score = probes.classification_score(model, cleaned, codes, folds=folds, random_state=random_state)
        accuracies[name] = score.accuracy
    # The first of equal accuracies in the table's order, as the audit names the strongest.
    strongest = max(accuracies, key=lambda name: (accuracies[name], -PROBES.index(name)))
    neighbours = geometry.nearest_neighbours(cleaned, NEIGHBOURS)
    task = nn_task = None
    if task_codes is not None:
        predicted = probes.cross_val_labels(
            probes.linear_probe(random_state), cleaned, task_codes, folds=folds, random_state=random_state
        )
        task = float(np.mean(predicted == task_codes))
        nn_task = geometry.neighbour_label_share(neighbours, task_codes)
    return PointFigures(
        linear=accuracies["linear"],
        strongest=accuracies[strongest],
        strongest_probe=strongest,
        nn_attribute=geometry.neighbour_label_share(neighbours, codes),
        task=task,
        nn_task=nn_task,
        distortion=geometry.relative_distortion(raw, cleaned),
    )
