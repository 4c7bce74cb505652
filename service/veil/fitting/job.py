"""The fitting job, one way for every sample: one pass, fit, audit on held-out rows, store an immutable version.

:func:`fit_version` is what ``veil fit`` runs; it is as usable from a
notebook or a scheduler as from the command line.  A sample in memory is a
stream of one partition; a large one arrives in many (``.npy`` row ranges,
shards, Parquet row groups), read once, here or on Dask workers.  The pass
gives the fitting rows' float64 moments and hash-drawn samples of both sides
of the split (see :mod:`veil.fitting.plan`); the same fit, checks, audit and
store steps then run whatever the source and the engine.

==================================  ============================  ======================================
method                              fitted from                   a sample of many partitions
==================================  ============================  ======================================
LEACE, mean projection              the moments of every row      exact: equal to the in-memory fit
INLP, moments classifier            ``partial_fit`` chunk by      equal to the in-memory fit of the
                                    chunk                         same rows where the split needs no repair
INLP (logistic, SVM), R-LACE        the rows                      a hash sample of ``fit_sample_rows``
==================================  ============================  ======================================
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from functools import partial
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil.checks.thresholds import AlertThresholds, AuditThresholds
from veil.defaults import (
    AUDIT_ROWS,
    ENGINES,
    FEW_CLASS_ROWS,
    FIT_SAMPLE_ROWS,
    MIN_CLASS_ROWS,
    STREAM_CHUNK_ROWS,
)
from veil.erasers import INLP, Erasure, MomentErasure
from veil.errors import DataError
from veil.fitting.methods import fit_collecting_notes, make_eraser
from veil.fitting.plan import PartResult, PassPlan, concatenated
from veil.fitting.store import FitOutcome, audit_and_store, audit_folds
from veil.fitting.sweep import Value, parse_target, run_sweep
from veil.fitting.sweep import sweep_values as strengths
from veil.maps.moments import MomentState
from veil.progress import advance, phase
from veil.registry import Registry
from veil.samples.attributes import attribute_columns, present_rows
from veil.samples.chunks import Partition, Sample

MOMENT_METHODS = ("leace", "meanproj")


def fit_version(
    sample: Sample,
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
    audit_thresholds: AuditThresholds | None = None,
    chunk_rows: int = STREAM_CHUNK_ROWS,
    audit_rows: int | None = None,
    fit_sample_rows: int | None = None,
    engine: str = "local",
    scheduler: str | None = None,
    workers: int = 2,
    sweep: bool = False,
    sweep_values: Sequence[Value] | None = None,
    targets: Sequence[str] = (),
) -> FitOutcome:
    """Fit an eraser on part of ``sample``, audit it on the rest, and store it as a new version of ``name``.

    Parameters
    ----------
    sample : Sample
        Embeddings with a categorical attribute (and optionally a task label):
        a :class:`~veil.samples.sources.LabelledSample` in memory or a
        :class:`~veil.samples.streaming.StreamedSample`.
    registry : Registry
    name : str
        The eraser's name in the registry (one per embedding space and attribute).
    method : {"leace", "meanproj", "inlp", "rlace"}
    params : mapping, optional
        Keyword arguments of the method's eraser (see :func:`veil.fitting.methods.parse_parameters`).
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
    audit_thresholds : AuditThresholds, optional
        Levels the verdict of this fit's audit and of later fresh audits is judged by (the defaults otherwise;
        see :mod:`veil.checks.verdict`).
    chunk_rows : int
        Rows read at a time from a streamed sample (a sample in memory is one chunk).
    audit_rows, fit_sample_rows : int, optional
        At most about this many held-out rows are audited, and fitting rows
        given to the methods that need rows, drawn by a hash.  Default: every
        row for a sample of one partition, :data:`veil.defaults.AUDIT_ROWS` and
        :data:`veil.defaults.FIT_SAMPLE_ROWS` for a streamed one, so that its
        memory is O(d² + chunk_rows · d + audit_rows · d) whatever its size.
    engine : {"local", "dask"}
        Run the pass in this process, or on dask.distributed workers (each
        partition read where it is processed, merged by a tree reduction, see
        :mod:`veil.fitting.distributed`).
    scheduler : str, optional
        Address of a running Dask scheduler; None starts a local cluster of ``workers`` processes.
    sweep : bool, default=False
        Also fit the method at every strength of a grid and measure each
        point on the held-out rows (see :mod:`veil.fitting.sweep`); the card
        and the report hold the curves.
    sweep_values : sequence, optional
        The strengths (values of the method's strength parameter) instead of its default grid.
    targets : sequence of str
        Targets such as ``"nn-attribute <= base + 0.05"`` (they imply a sweep): the version stored is the
        sweep's point of least distortion that meets every target.

    Raises
    ------
    DataError
        The sample or the options cannot make a version; nothing is written.
    TargetsMissedError
        No point of the sweep meets every target (the sweep is attached); nothing is written.
    """
    wanted = [parse_target(text) for text in targets]
    sweep = sweep or bool(wanted)
    if not 0.0 < holdout < 1.0:
        raise DataError(f"the held-out share must be between 0 and 1, got {holdout}")
    if chunk_rows < 1 or any(limit is not None and limit < 2 for limit in (audit_rows, fit_sample_rows)):
        raise DataError("chunk_rows must be at least 1, and the sample sizes at least 2 rows")
    if engine not in ENGINES:
        raise DataError(f"unknown engine {engine!r}; choose one of {', '.join(ENGINES)}")
    eraser = make_eraser(name, alias, method, params, seed=seed, normalize=normalize)
    partitions = sample.partitions(chunk_rows)
    streamed = len(partitions) > 1
    exact_moments = method in MOMENT_METHODS
    # Several attributes (or a continuous one) come as a table, the labels read and checked before the pass.
    table = sample.attribute_table
    if table:
        _check_table_options(method, eraser, sweep)
    # A sweep's points are configured (and checked) before the pass too: the pass accumulates what any needs.
    candidates = [eraser]
    if sweep:
        parameter, values = strengths(method, sweep_values)
        candidates += [
            make_eraser(name, alias, method, {**(params or {}), parameter: value}, seed=seed, normalize=normalize)
            for value in values
        ]
    try:
        # Checked before the pass: a parameter the fit would refuse must not cost a read of the whole sample.
        by_class = exact_moments and any(
            isinstance(candidate, MomentErasure) and candidate.needs_class_moments for candidate in candidates
        )
    except ValueError as error:
        raise DataError(f"{method}: {error}") from None
    # INLP's moments classifier streams through partial_fit; a sample of one partition is simply fitted.
    streams_inlp = streamed and isinstance(eraser, INLP) and eraser.classifier == "moments"
    if engine == "dask" and streams_inlp:
        raise DataError("INLP with the moments classifier fits sequentially; use the local engine (--stream)")
    if sweep and streams_inlp:
        raise DataError(
            "a sweep fits the method once per point, and INLP's moments classifier fits a streamed sample in its "
            "one pass: sweep the logistic classifier, or a sample in memory"
        )
    if streamed:
        audit_rows = AUDIT_ROWS if audit_rows is None else audit_rows
        fit_sample_rows = FIT_SAMPLE_ROWS if fit_sample_rows is None else fit_sample_rows
    expected_held = int(sample.labelled_rows * holdout)
    # The reference probe needs a sample of the fitting rows: as large as the audit's where the fit needs none.
    fit_limit = audit_rows if exact_moments or streams_inlp else fit_sample_rows
    plan = PassPlan(
        holdout=holdout,
        seed=seed,
        held_fraction=_share(audit_rows, expected_held),
        fit_fraction=_share(fit_limit, sample.labelled_rows - expected_held),
        exact_moments=exact_moments,
        whole=not streamed,
        by_class=by_class,
    )
    notes: list[str] = []
    if engine == "dask":
        from veil.fitting.distributed import run_pass

        total = run_pass(plan, partitions, scheduler=scheduler, workers=workers)
        if sample.attribute_dtype is not None:
            total = total.with_attribute_dtype(sample.attribute_dtype)
    else:
        total = _local_pass(plan, partitions, eraser if streams_inlp else None, notes)

    x_sample, z_sample, _ = concatenated(total.fit_sample, "fit")
    x_held, z_held, task_held = concatenated(total.held_sample, "audit")
    # Small classes first: a class too small to fit is refused with its remedy, before the audit's needs are checked.
    if table:
        if total.moments is None:
            raise DataError("no rows are left to fit on; lower the held-out share")
        blocks = total.moments.blocks
        counted = [
            (block.name, block.labels, total.moments.block(block.name).class_counts)
            for block in blocks
            if block.labels is not None
        ]
    else:
        if exact_moments:
            fitted = _classes_of(total.moments)
        elif streams_inlp:
            fitted = _classes_of(getattr(eraser, "moments_", None))
        else:
            fitted = np.unique(z_sample)
        source = total.moments if exact_moments else getattr(eraser, "moments_", None) if streams_inlp else None
        counts = np.unique(z_sample, return_counts=True)[1] if source is None else source.class_counts
        counted = [(sample.attribute_key, fitted, counts)] if fitted.size else []
    for attribute, classes, counts in counted:
        notes += _small_classes(attribute, classes, counts)
    if table and total.moments is not None and total.moments.partial:
        rows = ", ".join(
            f"{block.name} {state.count}"
            for block, state in zip(total.moments.blocks, total.moments.partial, strict=True)
        )
        notes.append(f"incomplete labels: each attribute was fitted on the fitting rows that carry it ({rows})")
    notes += list(getattr(sample, "notes", ()))
    if table:
        _check_table_split(sample, total.fit_rows, total.moments, z_held)
    else:
        _check_split(sample, total.fit_rows, fitted, z_held, audit_sampled=audit_rows is not None)

    def fit(candidate: Erasure) -> list[str]:
        if exact_moments:
            moments = total.moments
            assert moments is not None  # _check_split refuses a pass without fitting rows
            return fit_collecting_notes(candidate, method, partial(candidate.fit_moments, moments))
        return fit_collecting_notes(candidate, method, partial(candidate.fit, x_sample, z_sample))

    operating_points = None
    if sweep:
        point_notes: list[list[str]] = []

        def fit_at(parameter: str, value: Value) -> Erasure:
            point = make_eraser(
                name, alias, method, {**(params or {}), parameter: value}, seed=seed, normalize=normalize
            )
            with phase(f"sweep: fitting {method} at {parameter}={value}"):
                point_notes.append(fit(point))
            return point

        codes_held = np.searchsorted(fitted, z_held).astype(np.intp)
        task_codes = None if task_held is None else np.unique(task_held, return_inverse=True)[1].astype(np.intp)
        with phase("sweep: measuring the points"):
            operating_points, sweep_fits = run_sweep(
                method, sweep_values, fit_at, x_held, codes_held, task_codes, targets=wanted,
                folds=audit_folds(codes_held), nonlinear=nonlinear, random_state=seed,
            )  # fmt: skip
        if operating_points.chosen is not None:
            eraser = sweep_fits[operating_points.chosen]
            notes += point_notes[operating_points.chosen]
    if (operating_points is None or operating_points.chosen is None) and not streams_inlp:
        with phase(f"fitting {method}"):
            notes += fit(eraser)
    if fit_sample_rows is not None and not (exact_moments or streams_inlp):
        notes.append(
            f"{method} was fitted on a hash-drawn sample of {x_sample.shape[0]} of {total.fit_rows} fitting rows"
        )
    if audit_rows is not None:
        notes.append(f"audited on a hash-drawn sample of {x_held.shape[0]} of about {expected_held} held-out rows")
    return audit_and_store(
        eraser,
        sample,
        registry=registry,
        name=name,
        fit_rows=total.fit_rows,
        fit_sample=(x_sample, z_sample if table else np.searchsorted(eraser.classes_, z_sample).astype(np.intp)),
        held_out=(x_held, z_held, task_held),
        holdout=holdout,
        seed=seed,
        nonlinear=nonlinear,
        alias=alias,
        reason=reason or f"fitted by veil fit ({method}{', streamed' if streamed else ''})",
        thresholds=thresholds,
        audit_thresholds=audit_thresholds,
        notes=notes,
        operating_points=operating_points,
    )


def _share(limit: int | None, rows: int) -> float:
    """The share of ``rows`` a hash draws to keep about ``limit`` of them (all of them without a limit)."""
    return 1.0 if limit is None else min(1.0, limit / max(rows, 1))


def _local_pass(
    plan: PassPlan, partitions: Sequence[Partition], streaming: Erasure | None, notes: list[str]
) -> PartResult:
    """The pass in this process, partition by partition; ``streaming`` is given each chunk's fitting rows."""
    total = PartResult.empty()
    stop = partitions[-1].stop if partitions else 0
    for partition in partitions:
        chunk = partition.load()
        held = plan.split(chunk)
        if streaming is not None and (~held).any():
            x_fit, z_fit = chunk.embeddings[~held], chunk.attribute[~held]
            notes += fit_collecting_notes(streaming, "inlp", partial(streaming.partial_fit, x_fit, z_fit))
        # Only moments and the drawn samples are kept: the chunk's other rows are dropped here.
        total = total.merge(plan.process(chunk, held))
        advance("reading (rows)", partition.stop, stop)
    return total


def _check_table_options(method: str, eraser: Erasure, sweep: bool) -> None:
    """Refuse, before the pass, what several attributes (or a continuous one) cannot be fitted with."""
    if method not in MOMENT_METHODS:
        raise DataError(
            f"{method} erases one categorical attribute; several or continuous attributes need leace or meanproj"
        )
    if isinstance(eraser, MomentErasure) and eraser.needs_class_moments:
        raise DataError(f"{method}: covariance directions need one categorical attribute, not several")
    if sweep:
        raise DataError("a sweep measures one categorical attribute; fit several attributes without --sweep/--target")


def _check_table_split(sample: Sample, fit_rows: int, moments: MomentState | None, z_held: NDArray[Any]) -> None:
    """Refuse a split of several attributes that the eraser or the audit cannot use, naming the attribute."""
    if moments is None:
        raise DataError("no rows are left to fit on; lower the held-out share")
    try:
        moments.check_fittable()
    except ValueError as error:
        raise DataError(str(error)) from None
    fitted = {block.name: block.labels for block in moments.blocks}
    for attribute, continuous, every in attribute_columns(z_held):
        values = every[present_rows(z_held, attribute)]
        if continuous:
            if np.ptp(values) == 0:
                raise DataError(f"continuous attribute {attribute!r} takes a single value in the held-out rows")
            continue
        classes = fitted[attribute]
        assert classes is not None
        _check_split_classes(attribute, classes, values, audit_sampled=False)
    if fit_rows <= sample.dim // 10:
        raise DataError(f"only {fit_rows} rows are left to fit on; lower the held-out share")


def _classes_of(moments: MomentState | None) -> NDArray[Any]:
    return np.array([]) if moments is None or moments.labels is None else moments.labels


def _check_split(
    sample: Sample, fit_rows: int, fitted: NDArray[Any], z_held: NDArray[Any], *, audit_sampled: bool
) -> None:
    """Refuse a split the eraser or the audit cannot use: before anything is fitted, where the fit needs rows."""
    _check_split_classes(sample.attribute_key, fitted, z_held, audit_sampled=audit_sampled)
    if fit_rows <= sample.dim // 10:
        raise DataError(f"only {fit_rows} rows are left to fit on; lower the held-out share")


def _small_classes(attribute: str, classes: NDArray[Any], counts: NDArray[np.int64]) -> list[str]:
    """Refuse a class with fewer than :data:`MIN_CLASS_ROWS` fitting rows; a note for each with few."""
    present = counts > 0
    for label, count in zip(classes[present], counts[present], strict=True):
        if count < MIN_CLASS_ROWS:
            raise DataError(
                f"class {str(label)!r} of {attribute!r} has {int(count)} fitting row(s); a class needs at least "
                f"{MIN_CLASS_ROWS}: merge it with another (--merge-classes {attribute}:{label},OTHER=NEW) or add rows"
            )
    return [
        f"class {str(label)!r} of {attribute!r} has only {int(count)} fitting rows (fewer than {FEW_CLASS_ROWS}): "
        "its figures are uncertain; see its per-class recall in the audit"
        for label, count in zip(classes[present], counts[present], strict=True)
        if count < FEW_CLASS_ROWS
    ]


def _check_split_classes(attribute: str, fitted: NDArray[Any], z_held: NDArray[Any], *, audit_sampled: bool) -> None:
    """Refuse a categorical attribute whose fitted classes the eraser or the audit cannot use."""
    if fitted.size < 2:
        raise DataError(f"attribute {attribute!r} has a single class; erasure needs at least two")
    unseen = sorted(set(np.unique(z_held).tolist()) - set(fitted.tolist()))
    if unseen:
        raise DataError(f"class {unseen[0]!r} of {attribute!r} appears only in held-out rows; the eraser never saw it")
    counts = np.array([np.count_nonzero(z_held == c) for c in fitted])
    smallest = int(np.argmin(counts))
    if counts[smallest] < 2:
        where, remedy = (
            (" in the audit sample", "raise the held-out share or the audit sample")
            if audit_sampled
            else ("", "add rows or raise the held-out share")
        )
        raise DataError(
            f"class {fitted[smallest]!r} of {attribute!r} has {int(counts[smallest])} held-out row(s)"
            f"{where}; the audit needs at least 2 per class: {remedy}"
        )
