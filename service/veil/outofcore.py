"""The fitting job on samples too large for memory: one streaming pass, bounded memory.

For LEACE and mean projection the fit is exact: float64 moments of every
fitting row are accumulated chunk by chunk and merged (the eraser equals an
in-memory fit of the same rows to rounding).  INLP with the moments
classifier streams through ``partial_fit``.  INLP with logistic or SVM
classifiers and R-LACE need the rows themselves: they fit on a seeded
subsample of the fitting rows of at most ``fit_sample_rows`` rows.

Rows are held out by a seeded hash of their index (as everywhere in veil),
so no shuffle or second pass is needed.  The audit, the reference probe and
the report use hash-drawn samples of at most ``audit_rows`` held-out rows and
fitting rows; the card says how many of how many.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, replace
from functools import partial
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil._validation import encode_attribute
from veil.defaults import AUDIT_ROWS, ENGINES, FIT_SAMPLE_ROWS
from veil.errors import DataError
from veil.fitting import FitOutcome, audit_and_store, fit_collecting_notes, make_eraser
from veil.moments import MomentState
from veil.progress import phase
from veil.registry import Registry
from veil.splitting import holdout_mask
from veil.streaming import DEFAULT_CHUNK_ROWS, Chunk, Partition, StreamedSample
from veil.thresholds import AlertThresholds

DEFAULT_AUDIT_ROWS = AUDIT_ROWS
DEFAULT_FIT_SAMPLE_ROWS = FIT_SAMPLE_ROWS
# Independent hash streams for the held-out split and the two samples drawn from its sides.
_HELD_SAMPLE_SALT, _FIT_SAMPLE_SALT = 0x5EED1, 0x5EED2


Rows = tuple[NDArray[np.floating], NDArray[Any], NDArray[Any] | None]


@dataclass(frozen=True, eq=False)
class PartResult:
    """What one partition (or a merge of consecutive ones) contributes: fitting moments, counts and samples."""

    moments: MomentState | None
    fit_rows: int
    held_sample: list[Rows]
    fit_sample: list[Rows]
    fit_chunks: list[Rows]

    def merge(self, later: PartResult) -> PartResult:
        if self.moments is None or later.moments is None:
            moments = self.moments if later.moments is None else later.moments
        else:
            moments = self.moments.merge(later.moments)
        return PartResult(
            moments=moments,
            fit_rows=self.fit_rows + later.fit_rows,
            held_sample=self.held_sample + later.held_sample,
            fit_sample=self.fit_sample + later.fit_sample,
            fit_chunks=self.fit_chunks + later.fit_chunks,
        )


@dataclass(frozen=True)
class PassPlan:
    """How a partition is split and sampled; the same on every worker."""

    holdout: float
    seed: int
    held_fraction: float
    fit_fraction: float
    exact_moments: bool
    keep_fit_rows: bool  # INLP-moments streams its own fit rows through partial_fit on the driver

    def process(self, chunk: Chunk) -> PartResult:
        # The split hashes each row's index in the files, then rows without a label (dropped on request) leave
        # both sides: the same rows are held out as in memory, where dropped rows keep their indices too.
        held = holdout_mask(chunk.embeddings.shape[0], fraction=self.holdout, seed=self.seed, start=chunk.start)
        fit = ~held & ~chunk.missing
        held &= ~chunk.missing
        held_rows = _select(chunk, held, self.held_fraction, self.seed ^ _HELD_SAMPLE_SALT)
        fit_rows = _select(chunk, fit, self.fit_fraction, self.seed ^ _FIT_SAMPLE_SALT)
        moments = None
        if self.exact_moments and fit.any():
            x_fit, z_fit = chunk.embeddings[fit], chunk.attribute[fit]
            moments = MomentState.from_batch(x_fit, encode_attribute(z_fit, x_fit.shape[0], require_categorical=True))
        chunks: list[Rows] = []
        if self.keep_fit_rows and fit.any():
            chunks.append((chunk.embeddings[fit], chunk.attribute[fit], None))
        return PartResult(
            moments=moments,
            fit_rows=int(np.count_nonzero(fit)),
            held_sample=[held_rows] if held_rows[0].shape[0] else [],
            fit_sample=[fit_rows] if fit_rows[0].shape[0] else [],
            fit_chunks=chunks,
        )

    def process_partition(self, partition: Partition) -> PartResult:
        return self.process(partition.load())


def _select(chunk: Chunk, side: NDArray[np.bool_], fraction: float, seed: int) -> Rows:
    """The rows of one side of the split that a hash draws with probability ``fraction``."""
    keep = side.copy()
    if fraction < 1.0:
        keep &= holdout_mask(side.size, fraction=fraction, seed=seed, start=chunk.start)
    task = None if chunk.task is None else np.asarray(chunk.task)[keep]
    return chunk.embeddings[keep].copy(), np.asarray(chunk.attribute)[keep], task


def _rows(parts: list[Rows], what: str) -> Rows:
    if not parts:
        raise DataError(f"no rows were drawn for the {what}; the sample is too small to stream")
    tasks = [t for _, _, t in parts]
    return (
        np.concatenate([x for x, _, _ in parts]),
        np.concatenate([z for _, z, _ in parts]),
        None if tasks[0] is None else np.concatenate([t for t in tasks if t is not None]),
    )


def fit_version_streaming(
    sample: StreamedSample,
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
    chunk_rows: int = DEFAULT_CHUNK_ROWS,
    audit_rows: int = DEFAULT_AUDIT_ROWS,
    fit_sample_rows: int = DEFAULT_FIT_SAMPLE_ROWS,
    engine: str = "local",
    scheduler: str | None = None,
    workers: int = 2,
) -> FitOutcome:
    """Like :func:`veil.fitting.fit_version`, reading ``sample`` once, ``chunk_rows`` rows at a time.

    Memory is O(d² + chunk_rows · d + audit_rows · d) whatever the number of
    rows (plus ``fit_sample_rows · d`` for the methods that need rows).

    ``engine="dask"`` runs the pass on dask.distributed workers instead: each
    partition's moments and samples are computed where it is read, and merged
    by a tree reduction (see :mod:`veil.distributed`); ``scheduler`` is the
    address of a running cluster, or None to start a local one with
    ``workers`` processes.
    """
    if not 0.0 < holdout < 1.0:
        raise DataError(f"the held-out share must be between 0 and 1, got {holdout}")
    if chunk_rows < 1 or audit_rows < 2 or fit_sample_rows < 2:
        raise DataError("chunk_rows must be at least 1, and the sample sizes at least 2 rows")
    eraser = make_eraser(name, alias, method, params, seed=seed, normalize=normalize)
    exact_moments = method in ("leace", "meanproj")
    streams_inlp = method == "inlp" and eraser.get_params()["classifier"] == "moments"
    if engine not in ENGINES:
        raise DataError(f"unknown engine {engine!r}; choose one of {', '.join(ENGINES)}")
    if engine == "dask" and streams_inlp:
        raise DataError("INLP with the moments classifier fits sequentially; use the local engine (--stream)")
    expected_held = int(sample.labelled_rows * holdout)
    fit_limit = fit_sample_rows if not (exact_moments or streams_inlp) else audit_rows
    plan = PassPlan(
        holdout=holdout,
        seed=seed,
        held_fraction=min(1.0, audit_rows / max(expected_held, 1)),
        fit_fraction=min(1.0, fit_limit / max(sample.labelled_rows - expected_held, 1)),
        exact_moments=exact_moments,
        keep_fit_rows=streams_inlp,
    )
    notes: list[str] = []
    if engine == "dask":
        from veil.distributed import run_pass

        total = run_pass(plan, sample.partitions(chunk_rows), scheduler=scheduler, workers=workers)
    else:
        total = PartResult(moments=None, fit_rows=0, held_sample=[], fit_sample=[], fit_chunks=[])
        for chunk in sample.chunks(chunk_rows):
            part = plan.process(chunk)
            for x_fit, z_fit, _ in part.fit_chunks:
                notes += fit_collecting_notes(eraser, method, partial(eraser.partial_fit, x_fit, z_fit))
            # The fitting rows themselves are dropped here: only moments and samples are kept.
            total = total.merge(replace(part, fit_chunks=[]))
    fit_rows = total.fit_rows
    if exact_moments:
        moments = total.moments
        if moments is None or moments.labels is None or moments.labels.size < 2:
            raise DataError(f"attribute {sample.attribute_key!r} has a single class; erasure needs at least two")
        with phase(f"fitting {method}"):
            notes += fit_collecting_notes(eraser, method, lambda: eraser.fit_moments(moments))
    elif not streams_inlp:
        x_sample, z_sample, _ = _rows(total.fit_sample, "fit")
        with phase(f"fitting {method}"):
            notes += fit_collecting_notes(eraser, method, lambda: eraser.fit(x_sample, z_sample))
        notes.append(f"{method} was fitted on a hash-drawn sample of {x_sample.shape[0]} of {fit_rows} fitting rows")
    x_fit_sample, z_fit_sample, _ = _rows(total.fit_sample, "reference probe")
    x_held, z_held, task_held = _rows(total.held_sample, "audit")
    classes = np.asarray(eraser.classes_)
    unseen = sorted(set(np.unique(z_held).tolist()) - set(classes.tolist()))
    if unseen:
        raise DataError(f"class {unseen[0]!r} appears only in held-out rows; the eraser never saw it")
    counts = np.array([np.count_nonzero(z_held == c) for c in classes])
    if counts.min() < 2:
        raise DataError(
            f"class {classes[int(np.argmin(counts))]!r} has {int(counts.min())} held-out row(s) in the audit sample; "
            "the audit needs at least 2 per class: raise the held-out share or the audit sample"
        )
    notes.append(f"audited on a hash-drawn sample of {x_held.shape[0]} of about {expected_held} held-out rows")
    return audit_and_store(
        eraser,
        sample,
        registry=registry,
        name=name,
        fit_rows=fit_rows,
        fit_sample=(x_fit_sample, np.searchsorted(classes, z_fit_sample).astype(np.intp)),
        held_out=(x_held, z_held, task_held),
        holdout=holdout,
        seed=seed,
        nonlinear=nonlinear,
        alias=alias,
        reason=reason or f"fitted by veil fit ({method}, streamed)",
        thresholds=thresholds,
        notes=notes,
    )
