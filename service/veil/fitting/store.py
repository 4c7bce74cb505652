"""The last steps of every fit: audit on held-out rows, card, reference statistics, report, and the stored version."""

from __future__ import annotations

import dataclasses
import json
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil.audit import audit
from veil.audit.groups import FittingRows, group_fold_problem
from veil.audit.independence_run import settings_for
from veil.audit.points import Sweep
from veil.audit.probes import probe_folds
from veil.audit.report import AuditReport
from veil.checks.calibration import CALIBRATION_FILE, FIXED
from veil.checks.null_draws import DrawnAttribute, draw_calibration
from veil.checks.reference import REFERENCE_FILE, AttributeReference, ContinuousReference, ReferenceStatistics
from veil.checks.thresholds import AlertThresholds
from veil.erasers import Erasure
from veil.errors import DataError
from veil.fitting.request import FitRequest
from veil.fitting.rows import RefitRows, rows_needed
from veil.maps.artifact import MapArtifact
from veil.progress import phase
from veil.registry import CARD_FILE, AlertVerdictError, HistoryEvent, Registry, current_user
from veil.registry.artifact_files import encode_artifact
from veil.registry.card import build_card
from veil.reporting import PLOT_DATA_FILE, REPORT_FILE, PlotData, render_report
from veil.samples.attributes import attribute_columns, is_table, present_rows
from veil.samples.chunks import Sample

# The probes score by cross-validation inside the held-out rows.
AUDIT_FOLDS = 5


@dataclass(frozen=True)
class FitOutcome:
    """What a fit stored: the new version's id, its audit and card, and the alias move if one was asked for.

    ``refused`` says why the alias was not moved (the version's verdict is alert and the move was not forced);
    the version is stored all the same.
    """

    version_id: str
    audit: AuditReport
    card: dict[str, Any]
    promotion: HistoryEvent | None
    refused: str | None = None


def audit_folds(codes: NDArray[np.intp]) -> int:
    """The folds the probes use on held-out rows of these classes: :data:`AUDIT_FOLDS`, fewer for a rare class."""
    return min(AUDIT_FOLDS, probe_folds(codes, AUDIT_FOLDS))


def audit_and_store(
    eraser: Erasure,
    sample: Sample,
    request: FitRequest,
    *,
    registry: Registry,
    fit_rows: int,
    fit_sample: tuple[NDArray[np.floating], NDArray[Any]],
    held_out: tuple[NDArray[np.floating], NDArray[Any], NDArray[Any] | None],
    reason: str,
    notes: list[str],
    operating_points: Sweep | None = None,
    held_context: tuple[str, NDArray[Any]] | None = None,
    groups: HeldGroups | None = None,
    refit_rows: RefitRows | None = None,
) -> FitOutcome:
    """Audit a fitted eraser on held-out rows, build its card, reference and report, and store the version.

    ``fit_sample`` holds fitting rows with their attribute's class codes, or, for several attributes, their
    attribute table; each attribute is then audited on its own (the first categorical one's audit, reference
    and plots are the version's headline figures).  ``reason`` goes in the history if an alias is moved.
    ``held_context`` names the context column and gives its value on each held-out row (a ``--given`` fit):
    every categorical attribute is then also audited within each value.  ``groups`` (a ``--group`` fit) gives
    each fitting-sample and held-out row's group: the probes' folds then keep each group in one fold, and the
    transfer probe learns from the fitting sample (see :mod:`veil.audit.group_report`).  ``refit_rows`` are the
    fitting rows (labels, not codes) the audit refits the method on to measure the rows a fit needs (None: not
    measured; see :mod:`veil.fitting.rows`).
    """
    seed, nonlinear = request.fit.seed, request.audit.nonlinear
    independence = settings_for(request.audit.thorough)
    x_held, z_held, task_held = held_out
    artifact = eraser.export()
    attribute_audits: list[tuple[str, AuditReport]] = []
    attributes: tuple[AttributeReference, ...] = ()
    continuous: tuple[ContinuousReference, ...] = ()
    if is_table(z_held):
        attribute_audits = audit_each_attribute(
            z_held,
            lambda rows, target, folds: audit(
                eraser,
                x_held[rows],
                target,
                task=None if task_held is None else task_held[rows],
                **within_context(held_context, rows, target),
                folds=folds,
                nonlinear=nonlinear,
                random_state=seed,
                independence=independence,
            ),
        )
        first = _first_categorical(z_held)
        # The version's headline is its first categorical attribute (its first attribute if all are continuous).
        report = dict(attribute_audits)[first or attribute_audits[0][0]]
        if first is None:
            x_plot, codes_held = x_held, np.zeros(x_held.shape[0], dtype=np.intp)
        else:
            # The plots show the held-out rows that carry the first categorical attribute, coloured by it.
            plotted = present_rows(z_held, first)
            classes = artifact.moments.block(first).labels
            x_plot = x_held[plotted]
            codes_held = np.searchsorted(np.asarray(classes), z_held[first][plotted]).astype(np.intp)
        x_fit, z_fit = fit_sample
        with phase("reference statistics"):
            attributes = tuple(
                AttributeReference.from_fit(
                    artifact,
                    attribute,
                    x_fit[present_rows(z_fit, attribute)],
                    _codes_of(artifact, attribute, values[present_rows(z_fit, attribute)]),
                    random_state=seed,
                )
                for attribute, is_continuous, values in attribute_columns(z_fit)
                if not is_continuous
            )
            continuous = tuple(
                ContinuousReference.from_fit(
                    attribute, x_fit[present_rows(z_fit, attribute)], values[present_rows(z_fit, attribute)]
                )
                for attribute, is_continuous, values in attribute_columns(z_fit)
                if is_continuous
            )
        fit_codes = np.zeros(0, dtype=np.intp)  # the first attribute's reference is attributes[0]
        needed = rows_needed(eraser, request, None, report, (x_held, z_held), fit_rows=fit_rows, folds=AUDIT_FOLDS,
                             held_context=None)  # fmt: skip
        report = dataclasses.replace(report, rows_needed=needed)
    else:
        codes_held = np.searchsorted(np.asarray(eraser.classes_), z_held).astype(np.intp)
        folds = audit_folds(codes_held)
        # The audit reports each probe's folds as a stage of its own.
        report = audit(
            eraser, x_held, z_held, task=task_held, **within_context(held_context, None, z_held), folds=folds,
            nonlinear=nonlinear, random_state=seed, independence=independence,
            **_across_groups(groups, eraser, fit_sample, z_held),
        )  # fmt: skip
        x_plot = x_held
        fit_codes = fit_sample[1]
        needed = rows_needed(
            eraser, request, refit_rows, report, (x_held, z_held), fit_rows=fit_rows, folds=folds,
            held_context=None if held_context is None else held_context[1],
        )  # fmt: skip
        report = dataclasses.replace(report, rows_needed=needed)
    with phase("reference statistics"):
        reference = ReferenceStatistics.from_fit(
            artifact, fit_sample[0], fit_codes, random_state=seed, attributes=attributes, continuous=continuous
        )
    calibration = None
    if request.audit.live_draws:
        calibration = draw_calibration(
            artifact, reference, reference.whitening(), x_held, _drawn_attributes(artifact, reference, z_held),
            fit_rows=fit_rows, random_state=seed, probe_draws=request.audit.live_draws, stage="live-check calibration",
            context=None if held_context is None else np.array([str(value) for value in held_context[1]]),
        )  # fmt: skip
    with phase("report plots"):
        plots = PlotData.from_heldout(x_plot, eraser.transform(x_plot), codes_held, seed=seed)
    card = build_card(
        name=request.store.name,
        artifact=artifact,
        sample=sample,
        fit_rows=fit_rows,
        split_seed=seed,
        holdout=request.fit.holdout,
        audit=report,
        reference=reference,
        thresholds=request.audit.live_thresholds or AlertThresholds(),
        user=current_user(),
        notes=notes + list(report.notes),
        operating_points=None if operating_points is None else operating_points.to_dict(),
        audit_thresholds=request.audit.thresholds,
        attribute_audits=attribute_audits,
        request=request.to_dict(),
        embedding_model=request.store.embedding_model,
        claims=request.claims,
    )
    # The rule the version's live checks are judged by (a card without this entry keeps the fixed levels).
    card["live_levels"] = calibration.card_entry() if calibration is not None else {"rule": FIXED}
    files = encode_artifact(artifact)
    files[CARD_FILE] = json.dumps(card, indent=2, sort_keys=True, allow_nan=False).encode()
    files[REFERENCE_FILE] = reference.to_bytes()
    if calibration is not None:
        files[CALIBRATION_FILE] = calibration.to_bytes()
    files[PLOT_DATA_FILE] = plots.to_bytes()

    def report_page(version_id: str) -> dict[str, bytes]:
        return {REPORT_FILE: render_report(version_id, card, artifact.history, plots).encode()}

    with phase("storing the version"):
        name, alias = request.store.name, request.store.alias
        version_id = registry.add_version(name, files, derived=report_page)
        promotion, refused = None, None
        if alias is not None:
            try:
                promotion = registry.promote(name, version_id, alias=alias, reason=reason, force=request.store.force)
            except AlertVerdictError as error:
                refused = str(error)
    return FitOutcome(version_id=version_id, audit=report, card=card, promotion=promotion, refused=refused)


@dataclass(frozen=True, eq=False)
class HeldGroups:
    """The group column of a ``--group`` fit, and the group of each fitting-sample and held-out row."""

    column: str
    fit: NDArray[Any]
    held: NDArray[Any]


def _across_groups(
    groups: HeldGroups | None,
    eraser: Erasure,
    fit_sample: tuple[NDArray[np.floating], NDArray[Any]],
    z_held: NDArray[Any],
) -> dict[str, Any]:
    """The audit's ``group``, ``group_name`` and ``fitting`` for a ``--group`` fit (none without one)."""
    if groups is None:
        return {}
    problem = group_fold_problem(z_held, groups.held)
    if problem is not None:
        raise DataError(f"--group {groups.column}: {problem}")
    x_fit, codes = fit_sample
    labels = np.asarray(eraser.classes_)[codes]
    fit_groups = groups.fit if groups.fit.shape[0] == x_fit.shape[0] else None
    return {"group": groups.held, "group_name": groups.column, "fitting": FittingRows(x_fit, labels, fit_groups)}


def within_context(
    context: tuple[str, NDArray[Any]] | None, rows: NDArray[np.bool_] | None, target: NDArray[Any]
) -> dict[str, Any]:
    """The audit's ``given`` and ``given_name`` for ``rows`` (all: None) of a categorical ``target``; else none."""
    # A continuous attribute (a column of numbers) has no classes to read within a value.
    if context is None or target.ndim != 1:
        return {}
    column, values = context
    return {"given": values if rows is None else values[rows], "given_name": column}


def _drawn_attributes(
    artifact: MapArtifact, reference: ReferenceStatistics, z_held: NDArray[Any]
) -> list[DrawnAttribute]:
    """Each categorical attribute as the live-check draws see it: its classes, priors, pseudo-labels and codes."""
    if not is_table(z_held):
        if artifact.classes is None:
            return []
        classes = [str(c) for c in artifact.classes]
        return [DrawnAttribute("", classes, reference.class_priors, reference.probe_codes, _indexed(classes, z_held))]
    columns = {attribute: values for attribute, _, values in attribute_columns(z_held)}
    drawn = []
    for attribute in reference.attributes:
        classes = [str(c) for c in attribute.classes]
        codes = _indexed(classes, columns[attribute.name])
        codes[~present_rows(z_held, attribute.name)] = -1
        drawn.append(DrawnAttribute(attribute.name, classes, attribute.class_priors, attribute.probe_codes, codes))
    return drawn


def _indexed(classes: list[str], values: NDArray[Any]) -> NDArray[np.intp]:
    """Each value's position in ``classes``, compared as text as a live check does (−1: not a class)."""
    position = {label: i for i, label in enumerate(classes)}
    return np.array([position.get(str(value), -1) for value in values], dtype=np.intp)


def _first_categorical(z: NDArray[Any]) -> str | None:
    """The attribute whose figures head a version of several: the first categorical one (None: all continuous)."""
    for attribute, continuous, _ in attribute_columns(z):
        if not continuous:
            return attribute
    return None


def _codes_of(artifact: MapArtifact, attribute: str, values: NDArray[Any]) -> NDArray[np.intp]:
    classes = artifact.moments.block(attribute).labels
    assert classes is not None
    return np.searchsorted(classes, values).astype(np.intp)


def audit_each_attribute(
    z: NDArray[Any], run: Callable[[NDArray[np.bool_], NDArray[Any], int], AuditReport]
) -> list[tuple[str, AuditReport]]:
    """The audit of each attribute of a table (and of their intersection when it is guarded).

    ``run(rows, target, folds)`` audits one attribute on the rows that carry
    it (all of them unless labels are incomplete): class labels, or a
    continuous attribute as one column (audited by regression probes).
    """
    reports = []
    for attribute, continuous, every in attribute_columns(z):
        rows = present_rows(z, attribute)
        values = every[rows]
        with phase(f"auditing {attribute}"):
            if continuous:
                report = run(rows, np.asarray(values, dtype=np.float64)[:, None], AUDIT_FOLDS)
            else:
                report = run(rows, values, audit_folds(np.unique(values, return_inverse=True)[1].astype(np.intp)))
        reports.append((attribute, report))
    return reports
