"""The offline fitting job: split, fit, audit on held-out rows, and store an immutable version with its card.

:func:`fit_version` is what ``veil fit`` runs; it is as usable from a
notebook or a scheduler as from the command line.
"""

from __future__ import annotations

import json
import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil._validation import encode_attribute
from veil.audit import audit
from veil.audit.probes import probe_folds
from veil.audit.report import AuditReport
from veil.card import SampleDescription, build_card
from veil.datasource import LabelledSample
from veil.erasers import INLP, LEACE, RLACE, LinearErasure, MeanProjection
from veil.errors import DataError
from veil.progress import phase
from veil.reference import REFERENCE_FILE, ReferenceStatistics
from veil.registry import CARD_FILE, HistoryEvent, Registry, current_user
from veil.registry.naming import check_name
from veil.reporting import PLOT_DATA_FILE, REPORT_FILE, PlotData, render_report
from veil.serialization import encode_artifact
from veil.splitting import give_every_class_both_parts, holdout_mask
from veil.thresholds import AlertThresholds

METHODS: dict[str, type[LinearErasure]] = {
    "leace": LEACE,
    "meanproj": MeanProjection,
    "inlp": INLP,
    "rlace": RLACE,
}
# The probes score by cross-validation inside the held-out rows.
AUDIT_FOLDS = 5


def method_parameters(method: str) -> dict[str, Any]:
    """The parameters ``method`` accepts, with their defaults (``normalize`` and ``random_state`` excluded)."""
    if method not in METHODS:
        raise DataError(f"unknown method {method!r}; choose one of {', '.join(METHODS)}")
    defaults = METHODS[method]().get_params()
    return {key: value for key, value in defaults.items() if key not in ("normalize", "random_state")}


def _convert(method: str, key: str, text: str, default: Any) -> Any:
    """``text`` as the type of the parameter's default (a JSON literal where the default is None)."""
    try:
        if isinstance(default, bool):
            if text.lower() not in ("true", "false"):
                raise ValueError(text)
            return text.lower() == "true"
        if isinstance(default, int):
            return int(text)
        if isinstance(default, float):
            return float(text)
        if isinstance(default, str):
            return text
        return json.loads(text)
    except ValueError:
        kind = type(default).__name__ if default is not None else "JSON value"
        raise DataError(f"{method} parameter {key}={text!r} is not a valid {kind}") from None


def parse_parameters(method: str, assignments: Sequence[str]) -> dict[str, Any]:
    """``["max_iter=30", "classifier=moments"]`` as typed keyword arguments of ``method``'s eraser.

    Raises
    ------
    DataError
        An assignment without ``=``, or a parameter the method does not have
        (the message lists those it has).
    """
    known = method_parameters(method)
    parsed: dict[str, Any] = {}
    for assignment in assignments:
        key, separator, text = assignment.partition("=")
        key = key.strip().replace("-", "_")
        if not separator or not key:
            raise DataError(f"method options are KEY=VALUE, got {assignment!r}")
        if key not in known:
            raise DataError(f"{method} has no option {key!r}; its options are {', '.join(sorted(known))}")
        parsed[key] = _convert(method, key, text.strip(), known[key])
    return parsed


@dataclass(frozen=True)
class FitOutcome:
    """What a fit stored: the new version's id, its audit and card, and the alias move if one was asked for."""

    version_id: str
    audit: AuditReport
    card: dict[str, Any]
    promotion: HistoryEvent | None


def _split(
    sample: LabelledSample, codes: NDArray[np.intp], labels: NDArray[Any], holdout: float, seed: int
) -> NDArray[np.bool_]:
    if not 0.0 < holdout < 1.0:
        raise DataError(f"the held-out share must be between 0 and 1, got {holdout}")
    # The hash is of each row's index in the files, so rows dropped for a missing label move no other row.
    held = holdout_mask(sample.rows + sample.dropped_rows, fraction=holdout, seed=seed)
    if sample.kept is not None:
        held = held[sample.kept]
    held = give_every_class_both_parts(held, codes)
    counts = np.bincount(codes[held], minlength=labels.size)
    smallest = int(np.argmin(counts))
    if counts[smallest] < 2:
        raise DataError(
            f"class {labels[smallest]!r} of {sample.attribute_key!r} has {int(counts[smallest])} held-out row(s); "
            "the audit needs at least 2 per class: add rows or raise the held-out share"
        )
    if int(np.count_nonzero(~held)) <= sample.embeddings.shape[1] // 10:
        raise DataError(f"only {int(np.count_nonzero(~held))} rows are left to fit on; lower the held-out share")
    return held


def fit_version(
    sample: LabelledSample,
    *,
    registry: Registry,
    name: str,
    method: str,
    params: Mapping[str, Any] | None = None,
    holdout: float = 0.2,
    seed: int = 0,
    normalize: bool = False,
    nonlinear: bool = True,
    alias: str | None = None,
    reason: str = "",
    thresholds: AlertThresholds | None = None,
) -> FitOutcome:
    """Fit an eraser on part of ``sample``, audit it on the rest, and store it as a new version of ``name``.

    Parameters
    ----------
    sample : LabelledSample
        Embeddings with a categorical attribute (and optionally a task label).
    registry : Registry
    name : str
        The eraser's name in the registry (one per embedding space and attribute).
    method : {"leace", "meanproj", "inlp", "rlace"}
    params : mapping, optional
        Keyword arguments of the method's eraser (see :func:`parse_parameters`).
    holdout : float, default=0.2
        Share of rows held out for the audit, drawn by a seeded hash of the row index.
    seed : int, default=0
        Seeds the split, the probes and any randomised method.
    normalize : bool, default=False
        Re-normalise served vectors to unit length.
    nonlinear : bool, default=True
        Also audit with the nonlinear probes (quadratic, RBF kernel, boosted trees, MLP).
    alias : str, optional
        Point this alias at the new version once it is stored.
    reason : str
        Recorded in the history if an alias is moved.
    thresholds : AlertThresholds, optional
        Alert levels of the live checks (the defaults otherwise).

    Raises
    ------
    DataError
        The sample or the options cannot make a version; nothing is written.
    """
    eraser = make_eraser(name, alias, method, params, seed=seed, normalize=normalize)
    attribute = encode_attribute(sample.attribute, sample.rows, require_categorical=True)
    labels, codes = attribute.labels, attribute.codes
    if labels is None or labels.size < 2:
        raise DataError(f"attribute {sample.attribute_key!r} has a single class; erasure needs at least two")
    held = _split(sample, codes, labels, holdout, seed)
    fit_rows = ~held
    x = sample.embeddings
    with phase(f"fitting {method}"):
        notes = fit_collecting_notes(eraser, method, lambda: eraser.fit(x[fit_rows], sample.attribute[fit_rows]))
    return audit_and_store(
        eraser,
        sample,
        registry=registry,
        name=name,
        fit_rows=int(np.count_nonzero(fit_rows)),
        fit_sample=(x[fit_rows], codes[fit_rows]),
        held_out=(x[held], sample.attribute[held], None if sample.task is None else sample.task[held]),
        holdout=holdout,
        seed=seed,
        nonlinear=nonlinear,
        alias=alias,
        reason=reason or f"fitted by veil fit ({method})",
        thresholds=thresholds,
        notes=notes,
    )


def make_eraser(
    name: str, alias: str | None, method: str, params: Mapping[str, Any] | None, *, seed: int, normalize: bool
) -> LinearErasure:
    check_name(name)
    if alias is not None:
        check_name(alias, what="alias")
    options = dict(params or {})
    unknown = sorted(set(options) - set(method_parameters(method)))
    if unknown:
        raise DataError(f"{method} has no option {unknown[0]!r}")
    if "random_state" in METHODS[method]().get_params():
        options["random_state"] = seed
    return METHODS[method](**options, normalize=normalize)


def fit_collecting_notes(eraser: LinearErasure, method: str, fit: Callable[[], object]) -> list[str]:
    """Run ``fit``; bad data becomes a :class:`DataError`, and warnings become notes for the card."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            fit()
        except ValueError as error:
            raise DataError(f"{method} cannot fit this sample: {error}") from None
    return sorted({str(w.message) for w in caught if issubclass(w.category, UserWarning)})


def audit_and_store(
    eraser: LinearErasure,
    sample: SampleDescription,
    *,
    registry: Registry,
    name: str,
    fit_rows: int,
    fit_sample: tuple[NDArray[np.floating], NDArray[np.intp]],
    held_out: tuple[NDArray[np.floating], NDArray[Any], NDArray[Any] | None],
    holdout: float,
    seed: int,
    nonlinear: bool,
    alias: str | None,
    reason: str,
    thresholds: AlertThresholds | None,
    notes: list[str],
) -> FitOutcome:
    """Audit a fitted eraser on held-out rows, build its card, reference and report, and store the version."""
    x_held, z_held, task_held = held_out
    codes_held = np.searchsorted(np.asarray(eraser.classes_), z_held).astype(np.intp)
    folds = min(AUDIT_FOLDS, probe_folds(codes_held, AUDIT_FOLDS))
    # The audit reports each probe's folds as a stage of its own.
    report = audit(eraser, x_held, z_held, task=task_held, folds=folds, nonlinear=nonlinear, random_state=seed)
    artifact = eraser.export()
    with phase("reference statistics"):
        reference = ReferenceStatistics.from_fit(artifact, fit_sample[0], fit_sample[1], random_state=seed)
    with phase("report plots"):
        plots = PlotData.from_heldout(x_held, eraser.transform(x_held), codes_held, seed=seed)
    card = build_card(
        name=name,
        artifact=artifact,
        sample=sample,
        fit_rows=fit_rows,
        split_seed=seed,
        holdout=holdout,
        audit=report,
        reference=reference,
        thresholds=thresholds or AlertThresholds(),
        user=current_user(),
        notes=notes + list(report.notes),
    )
    files = encode_artifact(artifact)
    files[CARD_FILE] = json.dumps(card, indent=2, sort_keys=True, allow_nan=False).encode()
    files[REFERENCE_FILE] = reference.to_bytes()
    files[PLOT_DATA_FILE] = plots.to_bytes()

    def report_page(version_id: str) -> dict[str, bytes]:
        return {REPORT_FILE: render_report(version_id, card, artifact.history, plots).encode()}

    with phase("storing the version"):
        version_id = registry.add_version(name, files, derived=report_page)
        promotion = None
        if alias is not None:
            promotion = registry.promote(name, version_id, alias=alias, reason=reason)
    return FitOutcome(version_id=version_id, audit=report, card=card, promotion=promotion)
