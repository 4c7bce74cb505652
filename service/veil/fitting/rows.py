"""The rows a fit needs, measured during ``veil fit``'s audit: when it is measured, and on which rows.

The audit refits the method on 1/8, 1/4 and 1/2 of the fitting rows and
fits a curve to the held-out linear excess (:mod:`veil.audit.rows_curve`,
:mod:`veil.audit.rows_measure`).  By default (``rows_curve="auto"``) only the
methods whose refits are quick are measured.  Measured on the committed
sample (3,000 rows, 2,390 of them fitting rows, 384 dimensions, one core;
docs/methods.md, "Rows needed"), the three refits alone, against the fit:

==============  ==========  ==========  ============================================
method          fit         3 refits    default
==============  ==========  ==========  ============================================
leace           0.1 s       0.1 s       measured
meanproj        0.1 s       0.2 s       measured
rlace           2.4 s       2.0 s       measured
inlp            6.2 s       8.6 s       not measured: ``--rows-curve always``
transport       6.9 s       13.3 s      not measured: ``--rows-curve always``
==============  ==========  ==========  ============================================

INLP's and transport's refits cost more than their fit (neither shrinks
with the rows as the moments do), and with their readers they add a third
or more to a default ``veil fit`` of the committed sample (INLP 18.7 s to
53, transport 12.7 s to 21); LEACE's whole curve adds 1.4 s to about 17.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil.audit.report import AuditReport
from veil.audit.rows_curve import RowsNeeded
from veil.audit.rows_measure import measure_rows_needed
from veil.checks.thresholds import AuditThresholds
from veil.erasers import Erasure
from veil.fitting.request import FitRequest

#: The methods whose rows-needed curve the default fit measures (see the module's docstring).
QUICK_METHODS = ("leace", "meanproj", "rlace")


@dataclass(frozen=True)
class RefitRows:
    """The fitting rows the refits draw from: embeddings, attribute labels and each row's context value (or None)."""

    x: NDArray[np.floating]
    z: NDArray[Any]
    context: NDArray[Any] | None = None


def skip_reason(request: FitRequest, refit: RefitRows | None) -> str | None:
    """Why the fit's audit does not measure the rows needed (None: it does)."""
    spec, mode = request.fit, request.audit.rows_curve
    if mode == "never":
        return "not asked for (--rows-curve never)"
    if refit is None:
        return "the curve reads one categorical attribute; this version erases several or a continuous one"
    if len(spec.context_columns) > 1:
        return "the refits guard one context column; this version guards several"
    if request.audit.group is not None:
        # The version's own point is read on group folds; the refits' readers use ordinary folds, and one curve
        # through both kinds of reading would mix two questions.
        return f"the refits' readers do not keep the groups of --group {request.audit.group} in one fold"
    if mode == "auto" and spec.method not in QUICK_METHODS:
        return f"{spec.method} refits slowly (its three refits cost more than its fit); --rows-curve always measures it"
    return None


def rows_needed(
    eraser: Erasure,
    request: FitRequest,
    refit: RefitRows | None,
    report: AuditReport,
    held: tuple[NDArray[np.floating], NDArray[Any]],
    *,
    held_context: NDArray[Any] | None,
    fit_rows: int,
    folds: int,
) -> RowsNeeded:
    """The rows-needed record of a fit's audit: measured, or why not."""
    x_held, z_held = held
    reason = skip_reason(request, refit)
    if reason is not None or refit is None:
        return RowsNeeded(dim=int(x_held.shape[1]), heldout=int(x_held.shape[0]), population=None, reason=reason)
    thresholds = request.audit.thresholds or AuditThresholds()
    return measure_rows_needed(
        eraser, refit.x, refit.z, report, x_held,
        np.searchsorted(np.asarray(eraser.classes_), z_held).astype(np.intp),
        full_rows=fit_rows, threshold=thresholds.linear_gap.warn, folds=folds, seed=request.fit.seed,
        fit_context=refit.context if request.fit.given is not None else None,
        held_context=held_context, context_threshold=thresholds.context_linear_gap.warn,
    )  # fmt: skip
