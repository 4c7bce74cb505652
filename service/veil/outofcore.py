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
from functools import partial
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil._validation import encode_attribute
from veil.errors import DataError
from veil.fitting import FitOutcome, audit_and_store, fit_collecting_notes, make_eraser
from veil.moments import MomentState
from veil.registry import Registry
from veil.splitting import holdout_mask
from veil.streaming import DEFAULT_CHUNK_ROWS, StreamedSample
from veil.thresholds import AlertThresholds

DEFAULT_AUDIT_ROWS = 20_000
DEFAULT_FIT_SAMPLE_ROWS = 50_000
# Independent hash streams for the held-out split and the two samples drawn from its sides.
_HELD_SAMPLE_SALT, _FIT_SAMPLE_SALT = 0x5EED1, 0x5EED2


class _Sampler:
    """Keeps a hash-drawn share of the rows offered to it, up to about ``limit`` rows in all."""

    def __init__(self, limit: int, expected: int, seed: int) -> None:
        self.fraction = min(1.0, limit / max(expected, 1))
        self.seed = seed
        self.parts: list[tuple[NDArray[np.floating], NDArray[Any], NDArray[Any] | None]] = []

    def offer(self, start: int, x: NDArray[np.floating], z: NDArray[Any], task: NDArray[Any] | None) -> None:
        if self.fraction >= 1.0:
            keep = np.ones(x.shape[0], dtype=bool)
        else:
            keep = holdout_mask(x.shape[0], fraction=self.fraction, seed=self.seed, start=start)
        if keep.any():
            self.parts.append((x[keep].copy(), np.asarray(z)[keep], None if task is None else np.asarray(task)[keep]))

    def rows(self) -> tuple[NDArray[np.floating], NDArray[Any], NDArray[Any] | None]:
        if not self.parts:
            raise DataError("no rows were drawn for the audit; the sample is too small to stream")
        tasks = [t for _, _, t in self.parts]
        return (
            np.concatenate([x for x, _, _ in self.parts]),
            np.concatenate([z for _, z, _ in self.parts]),
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
) -> FitOutcome:
    """Like :func:`veil.fitting.fit_version`, reading ``sample`` once, ``chunk_rows`` rows at a time.

    Memory is O(d² + chunk_rows · d + audit_rows · d) whatever the number of
    rows (plus ``fit_sample_rows · d`` for the methods that need rows).
    """
    if not 0.0 < holdout < 1.0:
        raise DataError(f"the held-out share must be between 0 and 1, got {holdout}")
    if chunk_rows < 1 or audit_rows < 2 or fit_sample_rows < 2:
        raise DataError("chunk_rows must be at least 1, and the sample sizes at least 2 rows")
    eraser = make_eraser(name, alias, method, params, seed=seed, normalize=normalize)
    exact_moments = method in ("leace", "meanproj")
    streams_inlp = method == "inlp" and eraser.get_params()["classifier"] == "moments"
    expected_held = int(sample.rows * holdout)
    held_sample = _Sampler(audit_rows, expected_held, seed ^ _HELD_SAMPLE_SALT)
    fit_limit = fit_sample_rows if not (exact_moments or streams_inlp) else audit_rows
    fit_sample = _Sampler(fit_limit, sample.rows - expected_held, seed ^ _FIT_SAMPLE_SALT)
    moments: MomentState | None = None
    fit_rows = 0
    notes: list[str] = []
    for chunk in sample.chunks(chunk_rows):
        held = holdout_mask(chunk.embeddings.shape[0], fraction=holdout, seed=seed, start=chunk.start)
        fit = ~held
        held_sample.offer(chunk.start, chunk.embeddings[held], chunk.attribute[held], _rows(chunk.task, held))
        fit_sample.offer(chunk.start, chunk.embeddings[fit], chunk.attribute[fit], _rows(chunk.task, fit))
        if not fit.any():
            continue
        fit_rows += int(np.count_nonzero(fit))
        x_fit, z_fit = chunk.embeddings[fit], chunk.attribute[fit]
        if exact_moments:
            attribute = encode_attribute(z_fit, x_fit.shape[0], require_categorical=True)
            state = MomentState.from_batch(x_fit, attribute)
            moments = state if moments is None else moments.merge(state)
        elif streams_inlp:
            notes += fit_collecting_notes(eraser, method, partial(eraser.partial_fit, x_fit, z_fit))
    if exact_moments:
        if moments is None or moments.labels is None or moments.labels.size < 2:
            raise DataError(f"attribute {sample.attribute_key!r} has a single class; erasure needs at least two")
        merged = moments
        notes += fit_collecting_notes(eraser, method, lambda: eraser.fit_moments(merged))
    elif not streams_inlp:
        x_sample, z_sample, _ = fit_sample.rows()
        notes += fit_collecting_notes(eraser, method, lambda: eraser.fit(x_sample, z_sample))
        notes.append(
            f"{method} was fitted on a hash-drawn sample of {x_sample.shape[0]} of the {fit_rows} fitting rows"
        )
    x_fit_sample, z_fit_sample, _ = fit_sample.rows()
    x_held, z_held, task_held = held_sample.rows()
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


def _rows(values: NDArray[Any] | None, mask: NDArray[np.bool_]) -> NDArray[Any] | None:
    return None if values is None else np.asarray(values)[mask]
