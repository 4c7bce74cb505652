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

import dataclasses
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from functools import partial
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil.audit.points import Sweep
from veil.defaults import AUDIT_ROWS, FEW_CLASS_ROWS, FIT_SAMPLE_ROWS, MIN_CLASS_ROWS
from veil.erasers import INLP, Erasure, MomentErasure
from veil.errors import DataError
from veil.fitting.contexts import check_context_options, checked_contexts
from veil.fitting.methods import fit_collecting_notes, make_eraser
from veil.fitting.plan import PartResult, PassPlan, concatenated
from veil.fitting.request import FitRequest, MethodSpec, ReadingSpec
from veil.fitting.rows import RefitRows
from veil.fitting.store import FitOutcome, HeldGroups, audit_and_store, audit_folds
from veil.fitting.sweep import Target, Value, parse_target, run_sweep
from veil.fitting.sweep import sweep_values as strengths
from veil.maps.attribute import encode_attribute
from veil.maps.moments import MomentState
from veil.progress import advance, phase
from veil.registry import Registry
from veil.samples.attributes import attribute_columns, present_rows
from veil.samples.chunks import Partition, Sample
from veil.samples.embedding_model import fitted_model
from veil.samples.groups import group_key

MOMENT_METHODS = ("leace", "meanproj")


@dataclass(frozen=True)
class _Setup:
    """What the pass needs, decided and checked before it reads a row."""

    eraser: Erasure
    partitions: Sequence[Partition]
    plan: PassPlan
    targets: list[Target]
    #: INLP's moments classifier on a sample of many partitions: fitted chunk by chunk during the pass.
    streams_inlp: bool
    audit_rows: int | None
    fit_sample_rows: int | None

    @property
    def streamed(self) -> bool:
        return len(self.partitions) > 1


@dataclass(frozen=True)
class _Rows:
    """What the pass gave: the fitting rows' moments and counts, and hash-drawn rows of both sides of the split."""

    total: PartResult
    #: The fitted classes of a single categorical attribute (empty for an attribute table).
    classes: NDArray[Any]
    fit: tuple[NDArray[np.floating], NDArray[Any]]
    #: The context value of each fitting-sample row, for a method that fits rows within a context.
    fit_context: NDArray[Any] | None
    held: tuple[NDArray[np.floating], NDArray[Any], NDArray[Any] | None]


def fit_version(sample: Sample, request: FitRequest, *, registry: Registry) -> FitOutcome:
    """Fit an eraser on part of ``sample``, audit it on the rest, and store it as a new version.

    Parameters
    ----------
    sample : Sample
        Embeddings with a categorical attribute (or an attribute table), and optionally a task label: a
        :class:`~veil.samples.sources.LabelledSample` in memory or a :class:`~veil.samples.streaming.StreamedSample`.
    request : FitRequest
        What to fit, how to audit it, where to store it and how to read the sample (see
        :mod:`veil.fitting.request`); the card records it.
    registry : Registry

    Raises
    ------
    DataError
        The sample or the request cannot make a version; nothing is written.
    TargetsMissedError
        No point of the sweep meets every target (the sweep is attached); nothing is written.
    """
    # A model the request names against another the sample file states is refused before any row is read.
    fitted_model(request.store.embedding_model, sample.embedding_model)
    setup = _prepare(sample, request)
    notes: list[str] = []
    total = _read(setup, request.reading, sample, notes)
    rows = _checked_rows(sample, setup, total, notes, pool=request.fit.pool_small_values)
    eraser, operating_points = _fit(setup, request, rows, notes)
    notes += _sampling_notes(setup, request.fit.method, rows, expected_held=_expected_held(sample, request))
    streamed = ", streamed" if setup.streamed else ""
    return audit_and_store(
        eraser,
        sample,
        request,
        registry=registry,
        fit_rows=total.fit_rows,
        fit_sample=rows.fit if sample.attribute_table else _coded(rows.fit, eraser),
        held_out=rows.held,
        held_context=_held_context(sample, rows.total),
        groups=_groups(sample, rows.total),
        reason=request.store.reason or f"fitted by veil fit ({request.fit.method}{streamed})",
        notes=notes,
        operating_points=operating_points,
        refit_rows=None if sample.attribute_table else RefitRows(*rows.fit, context=rows.fit_context),
    )


def _held_context(sample: Sample, total: PartResult) -> tuple[str, NDArray[Any]] | None:
    """The first context column and its values on the audited held-out rows (None: the sample has no context)."""
    if not sample.context_keys or not total.held_context:
        return None
    return sample.context_keys[0], np.concatenate(total.held_context)


def _groups(sample: Sample, total: PartResult) -> HeldGroups | None:
    """The group column and each fitting-sample and held-out row's group (None: the sample has no group)."""
    column = group_key(sample)
    if column is None:
        return None
    fit_group = np.concatenate(total.fit_group) if total.fit_group else np.array([], dtype=str)
    return HeldGroups(column, fit_group, np.concatenate(total.held_group))


def _prepare(sample: Sample, request: FitRequest) -> _Setup:
    """The eraser, the partitions and the pass plan; refuses, before any row is read, what cannot be fitted."""
    spec, reading = request.fit, request.reading
    targets = [parse_target(text) for text in spec.targets]
    eraser = make_eraser(spec)
    partitions = sample.partitions(reading.chunk_rows)
    streamed = len(partitions) > 1
    exact_moments = spec.method in MOMENT_METHODS
    # Several attributes (or a continuous one) come as a table, the labels read and checked before the pass.
    if sample.attribute_table:
        _check_table_options(spec.method, eraser, spec.sweeps)
        if group_key(sample) is not None:
            raise DataError("group folds (--group) read one categorical attribute; fit several without --group")
    check_context_options(sample, spec)
    if group_key(sample) != request.audit.group:
        raise DataError(
            f"the request's group column is {request.audit.group!r} and the sample was read with "
            f"{group_key(sample)!r}: read it with veil.samples.groups.with_group(sample, column)"
        )
    by_class = exact_moments and _needs_class_moments(spec, eraser)
    streams_inlp = streamed and isinstance(eraser, INLP) and eraser.classifier == "moments"
    if reading.engine == "dask" and streams_inlp:
        raise DataError("INLP with the moments classifier fits sequentially; use the local engine (--stream)")
    if spec.sweeps and streams_inlp:
        raise DataError(
            "a sweep fits the method once per point, and INLP's moments classifier fits a streamed sample in its "
            "one pass: sweep the logistic classifier, or a sample in memory"
        )
    audit_rows, fit_sample_rows = request.audit.rows, reading.fit_sample_rows
    if streamed:
        audit_rows = AUDIT_ROWS if audit_rows is None else audit_rows
        fit_sample_rows = FIT_SAMPLE_ROWS if fit_sample_rows is None else fit_sample_rows
    expected_held = _expected_held(sample, request)
    # The reference probe needs a sample of the fitting rows: as large as the audit's where the fit needs none.
    fit_limit = audit_rows if exact_moments or streams_inlp else fit_sample_rows
    plan = PassPlan(
        holdout=spec.holdout,
        seed=spec.seed,
        held_fraction=_share(audit_rows, expected_held),
        fit_fraction=_share(fit_limit, sample.labelled_rows - expected_held),
        exact_moments=exact_moments,
        whole=not streamed,
        by_class=by_class,
    )
    return _Setup(eraser, partitions, plan, targets, streams_inlp, audit_rows, fit_sample_rows)


def _needs_class_moments(spec: MethodSpec, eraser: Erasure) -> bool:
    """Whether the eraser, or any point of its sweep, reads per-class co-moments (which the pass then gathers)."""
    candidates = [eraser]
    if spec.sweeps:
        parameter, values = strengths(spec.method, spec.sweep_values)
        candidates += [make_eraser(spec, **{parameter: value}) for value in values]
    try:
        # Checked before the pass: a parameter the fit would refuse must not cost a read of the whole sample.
        return any(isinstance(candidate, MomentErasure) and candidate.needs_class_moments for candidate in candidates)
    except ValueError as error:
        raise DataError(f"{spec.method}: {error}") from None


def _expected_held(sample: Sample, request: FitRequest) -> int:
    return int(sample.labelled_rows * request.fit.holdout)


def _read(setup: _Setup, reading: ReadingSpec, sample: Sample, notes: list[str]) -> PartResult:
    """The one pass over the sample's partitions, here or on Dask workers."""
    if reading.engine == "dask":
        from veil.fitting.distributed import run_pass

        total = run_pass(setup.plan, setup.partitions, scheduler=reading.scheduler, workers=reading.workers)
        # Dask's serialisation returns the attribute table without its dtype's metadata.
        return total if sample.attribute_dtype is None else total.with_attribute_dtype(sample.attribute_dtype)
    return _local_pass(setup.plan, setup.partitions, setup.eraser if setup.streams_inlp else None, notes)


def _checked_rows(sample: Sample, setup: _Setup, total: PartResult, notes: list[str], *, pool: bool) -> _Rows:
    """The pass's rows, once the classes and the split are known to make a version; notes on small classes.

    Context values with a small class are refused, or pooled when ``pool`` (see :mod:`veil.fitting.contexts`).
    """
    x_fit, z_fit, _ = concatenated(total.fit_sample, "fit")
    held = concatenated(total.held_sample, "audit")
    # Small classes first: a class too small to fit is refused with its remedy, before the audit's needs are checked.
    if sample.attribute_table:
        classes: NDArray[Any] = np.array([])
        counted = _table_class_counts(total.moments)
    else:
        classes, counts = _fitted_classes(setup, total, z_fit)
        counted = [(sample.attribute_key, classes, counts)] if classes.size else []
    for attribute, labels, counts in counted:
        notes += _small_classes(attribute, labels, counts)
    fit_context = np.concatenate(total.fit_context) if total.fit_context else None
    if total.moments is not None and total.moments.given is not None:
        # Small context values refused or pooled, on the merged moments: the fit reads the pooled ones.
        moments, cell_notes = checked_contexts(total.moments, sample.attribute_key, pool=pool)
        total = dataclasses.replace(total, moments=moments)
        notes += cell_notes
    elif fit_context is not None:
        # A method fitted on rows within a context (transport): the same cell rules, on the rows it is fitted on.
        cells = MomentState.from_batch(
            x_fit, encode_attribute(z_fit, z_fit.shape[0]), given={sample.context_keys[0]: fit_context}
        )
        notes += checked_contexts(cells, sample.attribute_key, pool=False, poolable=False)[1]
    if sample.attribute_table and total.moments is not None and total.moments.partial:
        rows = ", ".join(
            f"{block.name} {state.count}"
            for block, state in zip(total.moments.blocks, total.moments.partial, strict=True)
        )
        notes.append(f"incomplete labels: each attribute was fitted on the fitting rows that carry it ({rows})")
    notes += list(getattr(sample, "notes", ()))
    if len(sample.context_keys) > 1:
        first, others = sample.context_keys[0], ", ".join(map(repr, sample.context_keys[1:]))
        notes.append(
            f"the audit within a context reads {first!r} only: {others} guarded on the fitting rows but not audited "
            f"within its values here (veil audit --given COLUMN on a fresh sample does that)"
        )
    if sample.attribute_table:
        _check_table_split(sample, total.fit_rows, total.moments, held[1])
    else:
        _check_split(sample, total.fit_rows, classes, held[1], audit_sampled=setup.audit_rows is not None)
    return _Rows(total, classes, (x_fit, z_fit), fit_context, held)


def _table_class_counts(moments: MomentState | None) -> list[tuple[str, NDArray[Any], NDArray[np.int64]]]:
    """Each categorical attribute of a table with its classes and their fitting rows."""
    if moments is None:
        raise DataError("no rows are left to fit on; lower the held-out share")
    return [
        (block.name, block.labels, moments.block(block.name).class_counts)
        for block in moments.blocks
        if block.labels is not None
    ]


def _fitted_classes(setup: _Setup, total: PartResult, z_fit: NDArray[Any]) -> tuple[NDArray[Any], NDArray[np.int64]]:
    """The classes of a single attribute and their fitting rows: from the moments where the pass kept them."""
    if setup.plan.exact_moments:
        source = total.moments
    elif setup.streams_inlp:
        source = getattr(setup.eraser, "moments_", None)
    else:
        classes, counts = np.unique(z_fit, return_counts=True)
        return classes, counts.astype(np.int64)
    if source is None or source.labels is None:
        return np.array([]), np.zeros(0, dtype=np.int64)
    return source.labels, source.class_counts


def _fit(setup: _Setup, request: FitRequest, rows: _Rows, notes: list[str]) -> tuple[Erasure, Sweep | None]:
    """The eraser fitted on the fitting rows: at the request's options, or at the point a sweep chose."""
    spec = request.fit
    moments = rows.total.moments
    x_fit, z_fit = rows.fit

    def fit(candidate: Erasure) -> list[str]:
        if spec.method in MOMENT_METHODS:
            assert moments is not None  # _check_split refuses a pass without fitting rows
            return fit_collecting_notes(candidate, spec.method, partial(candidate.fit_moments, moments))
        given = {} if spec.given is None else {"given": rows.fit_context}
        return fit_collecting_notes(candidate, spec.method, partial(candidate.fit, x_fit, z_fit, **given))

    eraser, operating_points = setup.eraser, None
    if spec.sweeps:
        operating_points, chosen, point_notes = _sweep(setup, request, rows, fit)
        if chosen is not None:
            eraser = chosen
            notes += point_notes
    if (operating_points is None or operating_points.chosen is None) and not setup.streams_inlp:
        with phase(f"fitting {spec.method}"):
            notes += fit(eraser)
    return eraser, operating_points


def _sweep(
    setup: _Setup, request: FitRequest, rows: _Rows, fit: Callable[[Erasure], list[str]]
) -> tuple[Sweep, Erasure | None, list[str]]:
    """Every point of the method's sweep fitted and measured on the held-out rows; the chosen one and its notes."""
    spec = request.fit
    point_notes: list[list[str]] = []

    def fit_at(parameter: str, value: Value) -> Erasure:
        point = make_eraser(spec, **{parameter: value})
        with phase(f"sweep: fitting {spec.method} at {parameter}={value}"):
            point_notes.append(fit(point))
        return point

    x_held, z_held, task_held = rows.held
    codes_held = np.searchsorted(rows.classes, z_held).astype(np.intp)
    task_codes = None if task_held is None else np.unique(task_held, return_inverse=True)[1].astype(np.intp)
    with phase("sweep: measuring the points"):
        points, fitted = run_sweep(
            spec.method, spec.sweep_values, fit_at, x_held, codes_held, task_codes, targets=setup.targets,
            folds=audit_folds(codes_held), nonlinear=request.audit.nonlinear, random_state=spec.seed,
        )  # fmt: skip
    if points.chosen is None:
        return points, None, []
    return points, fitted[points.chosen], point_notes[points.chosen]


def _coded(
    rows: tuple[NDArray[np.floating], NDArray[Any]], eraser: Erasure
) -> tuple[NDArray[np.floating], NDArray[np.intp]]:
    """Fitting rows of a single attribute with their labels as the fitted eraser's class codes."""
    x, z = rows
    return x, np.searchsorted(eraser.classes_, z).astype(np.intp)


def _sampling_notes(setup: _Setup, method: str, rows: _Rows, *, expected_held: int) -> list[str]:
    """Notes for the card on the rows a hash drew for a method that needs rows, and for the audit."""
    notes = []
    if setup.fit_sample_rows is not None and not (setup.plan.exact_moments or setup.streams_inlp):
        notes.append(
            f"{method} was fitted on a hash-drawn sample of {rows.fit[0].shape[0]} of {rows.total.fit_rows} "
            "fitting rows"
        )
    if setup.audit_rows is not None:
        notes.append(
            f"audited on a hash-drawn sample of {rows.held[0].shape[0]} of about {expected_held} held-out rows"
        )
    return notes


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
