"""Fitting time: no-drift live samples drawn from the held-out rows, and every live figure computed on each draw.

Two kinds of draw, because the figures read a sample in two ways:

- The shift figures (mean and covariance shift, erased-variance ratio, prior
  shift, and the erased class-mean gap of each categorical attribute with
  labels and with pseudo-labels) need no probe.  They are drawn *with*
  replacement, at every size (larger than the held-out rows too): a
  bootstrap sample's spread around the reference is that of independent rows.
  At sizes far beyond the held-out rows the held-out rows' own distance from
  the reference adds to it, which widens the curve (fewer alarms, never more).
- The probe figures (the leakage of each categorical attribute, with labels
  and with the pre-erasure probe's pseudo-labels) score a probe by
  cross-validation *within* the sample.  A repeated row would sit in a
  training and a testing fold at once and be read back, so these draws are
  taken *without* replacement, at the sizes up to half the rows available
  (half of them itself if the grid skips it); the spread of such draws is
  narrower than independent samples' by the finite-population factor
  ``sqrt((N − n) / (N − 1))``, which is divided out.  Larger sizes are
  extrapolated (see :mod:`veil.checks.calibration`).

Each probe figure costs a cross-validated logistic regression per draw, and
these dominate the time: their draws are fewer (:data:`PROBE_DRAWS`) than the
shift figures' (:data:`SHIFT_DRAWS`).  The leakage within a context is
drawn (with labels) when the fit had a context column; a continuous
attribute's leakage is not drawn: a calibrated check judges it by its fixed
level, and says so.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from veil.audit.within import context_audit
from veil.checks.calibration import FigureNull, LiveCalibration, null_key
from veil.checks.drift import MIN_ROWS, PROBE_FOLDS, _class_figures, erased_coordinates
from veil.checks.reference import ReferenceStatistics
from veil.defaults import LIVE_PROBE_DRAWS
from veil.maps.artifact import MapArtifact
from veil.progress import advance

#: Live sample sizes drawn (the shift figures at every one; the probe figures up to half the held-out rows).
SIZES = (100, 300, 1000, 3000)
SHIFT_DRAWS = 300
PROBE_DRAWS = LIVE_PROBE_DRAWS
#: At most this many held-out rows are the pool the shift figures are drawn from.
SHIFT_POOL = 2000


@dataclass(frozen=True)
class DrawnAttribute:
    """One categorical attribute as the draws see it.

    ``name`` is ``""`` for a version of one attribute; ``codes`` index
    ``classes`` on every held-out row (−1 where a row lacks its label).
    """

    name: str
    classes: list[str]
    priors: NDArray[np.float64]
    pseudo: Callable[[NDArray[np.floating]], NDArray[np.intp]]
    codes: NDArray[np.intp]


def moment_figures(
    x: NDArray[np.float64],
    white: NDArray[np.float64],
    removed: NDArray[np.float64],
    reference_share: float,
    counts: NDArray[np.float64],
) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
    """``mean_shift_raw``, ``covariance_shift_raw`` and ``erased_variance_ratio`` of bootstrap draws.

    Each row of ``counts`` (shape (B, N)) says how often each of the N rows
    is drawn; the figures are those :func:`check_drift` computes on the
    drawn rows, from sums over the N rows weighted by their counts (the
    covariance's Frobenius norm through the rows' Gram matrix), so that no
    draw is materialised.  ``white`` holds the rows in the fit's whitened
    units, ``removed`` the part erasure removes from each.
    """
    n = counts.sum(axis=1)
    r = white.shape[1]
    mean = counts @ white / n[:, None]
    mean_sq = np.sum(mean**2, axis=1)
    # Σ = S / n − m mᵀ with S = Σ_i c_i v_i v_iᵀ:  ‖S‖² = cᵀ (G∘G) c,  mᵀ S m = Σ_i c_i (v_i · m)².
    gram = white @ white.T
    s_norm_sq = np.einsum("bi,bi->b", counts @ (gram * gram), counts)
    s_trace = counts @ np.sum(white**2, axis=1)
    m_s_m = np.einsum("bi,bi->b", counts, (mean @ white.T) ** 2)
    cov_norm_sq = s_norm_sq / n**2 - 2 * m_s_m / n + mean_sq**2
    cov_trace = s_trace / n - mean_sq
    covariance = np.sqrt(np.maximum(cov_norm_sq - 2 * cov_trace + r, 0.0)) / np.sqrt(r)
    spread = _weighted_spread(x, counts, n)
    share = np.divide(_weighted_spread(removed, counts, n), spread, out=np.zeros_like(spread), where=spread > 0)
    ratio = share / reference_share if reference_share > 0 else np.zeros_like(share)
    return np.sqrt(mean_sq), covariance, ratio


def _weighted_spread(
    a: NDArray[np.float64], counts: NDArray[np.float64], n: NDArray[np.float64]
) -> NDArray[np.float64]:
    """Each draw's sum of squared distances from its mean: ``Σ c_i ‖a_i‖² − n ‖ā‖²``."""
    mean = counts @ a / n[:, None]
    return np.asarray(counts @ np.sum(a**2, axis=1) - n * np.sum(mean**2, axis=1))


def toward_reference(held_rows: int, fit_rows: int) -> float:
    """How much of the held-out rows' offset from the reference a live sample's null keeps: ``sqrt(H / (F + H))``.

    The held-out rows' mean (or covariance, or class shares) differs from the
    reference's by the reference's own error (variance ∝ 1 / F, which every
    live sample of this version carries too) plus the held-out rows' own
    (∝ 1 / H, which no live sample carries).  Scaling the offset by this
    factor gives it the expected size of the reference's error alone; left
    whole, the no-drift curves of large samples would sit well above what
    quiet traffic reads (on the committed sample, 1,920 fitting rows and 480
    held out, the mean shift's curve at 3,000 rows sat at 0.68, where the
    reference's error alone gives about ``sqrt(r / F)`` = 0.26).
    """
    return float(np.sqrt(held_rows / (fit_rows + held_rows))) if fit_rows > 0 else 1.0


def _shrunk_offset(white: NDArray[np.float64], keep: float) -> NDArray[np.float64]:
    """The rows moved so that their mean's and covariance's offsets from the reference (0, I) shrink by ``keep``.

    Rows too few to estimate a full covariance (fewer than twice the
    dimensions) keep their covariance: their offset then stays whole.
    """
    n, r = white.shape
    mean = white.mean(axis=0)
    centred = white - mean
    if n < 2 * r:
        return np.asarray(centred + keep * mean)
    covariance = centred.T @ centred / n
    values, vectors = np.linalg.eigh(covariance)
    target = np.eye(r) + keep * (covariance - np.eye(r))
    t_values, t_vectors = np.linalg.eigh(target)
    # centred · C^{-1/2} · T^{1/2}: covariance T, the rows' shape otherwise kept.
    inverse_root = (vectors / np.sqrt(np.maximum(values, values.max() * 1e-12))) @ vectors.T
    root = (t_vectors * np.sqrt(np.maximum(t_values, 0.0))) @ t_vectors.T
    return np.asarray(centred @ inverse_root @ root + keep * mean)


def probe_sizes(rows: int, sizes: tuple[int, ...] = SIZES) -> list[int]:
    """The sizes the probe figures are drawn at from ``rows`` rows: the grid's up to half of them, and that half."""
    half = rows // 2
    chosen = [size for size in sizes if size <= half]
    if half >= MIN_ROWS and half < max(sizes) and half not in chosen:
        chosen.append(half)
    return sorted(chosen)


def draw_calibration(
    artifact: MapArtifact,
    reference: ReferenceStatistics,
    whitening: NDArray[np.float64],
    x_held: NDArray[np.floating],
    attributes: list[DrawnAttribute],
    *,
    fit_rows: int,
    random_state: int,
    sizes: tuple[int, ...] = SIZES,
    shift_draws: int = SHIFT_DRAWS,
    probe_draws: int = PROBE_DRAWS,
    context: NDArray[np.str_] | None = None,
    stage: str | None = None,
) -> LiveCalibration:
    """Every live figure's no-drift distribution from draws of the held-out rows ``x_held``.

    ``fit_rows`` (the rows the reference was estimated on) sizes the reference's own error, which live
    samples carry and the held-out rows' offset from the reference overstates (see :func:`toward_reference`).
    ``context`` (each held-out row's value of the fit's context column, as text) adds the leakage within a
    context: the first attribute's, with labels (a live check refuses a context without them).
    """
    rng = np.random.default_rng(random_state)
    x = np.asarray(x_held, dtype=np.float64)
    rows = x.shape[0]
    white = (x - reference.mean) @ whitening
    removed = np.asarray(artifact.map.component(x), dtype=np.float64)
    erased = np.asarray(artifact.apply(np.asarray(x_held)))
    pseudo = [attribute.pseudo(x) for attribute in attributes]
    shifts: dict[str, dict[int, list[float]]] = {}
    total = len(sizes) + len(attributes) * 2 + (context is not None and bool(attributes))
    if stage is not None:
        advance(stage, 0, total)
    # The shift figures read a pool of at most SHIFT_POOL rows: their Gram matrix is pool² numbers.
    pool = np.sort(rng.choice(rows, min(rows, SHIFT_POOL), replace=False))
    keep = toward_reference(pool.size, fit_rows)
    pool_white = _shrunk_offset(white[pool], keep)
    # The class-mean gap's coordinates (wider than the rows) only for the pool it is drawn from.
    coordinates = erased_coordinates(erased[pool], reference)
    gap_pools = {
        (attribute.name, source): _gap_pool(coordinates, codes[pool])
        for attribute, guessed in zip(attributes, pseudo, strict=True)
        for source, codes in (("labels", attribute.codes), ("pseudo-labels", guessed))
    }
    for step, size in enumerate(sizes):
        counts = np.stack(
            [np.bincount(rng.integers(0, pool.size, size), minlength=pool.size) for _ in range(shift_draws)]
        )
        figures = moment_figures(
            x[pool], pool_white, removed[pool], reference.erased_variance_share, counts.astype(np.float64)
        )
        for figure, values in zip(("mean_shift", "covariance_shift", "erased_variance_ratio"), figures, strict=True):
            shifts.setdefault(null_key(figure), {})[size] = list(values)
        for attribute, guessed in zip(attributes, pseudo, strict=True):
            for source, codes in (("labels", attribute.codes), ("pseudo-labels", guessed)):
                labelled = codes[codes >= 0]
                shares = np.bincount(labelled, minlength=len(attribute.classes)) / labelled.size
                if source == "labels":
                    # The held-out shares' offset from the fitted priors, shrunk to the priors' own error.
                    shares = attribute.priors + toward_reference(labelled.size, fit_rows) * (shares - attribute.priors)
                    shares = np.maximum(shares, 0.0) / np.maximum(shares, 0.0).sum()
                # Pseudo-labels keep their shares: the pre-erasure probe's lean to a class is live traffic's too.
                counts = rng.multinomial(size, shares, size=shift_draws)
                tv = 0.5 * np.abs(counts / size - attribute.priors).sum(axis=1)
                shifts.setdefault(null_key("prior_shift", source, attribute.name), {})[size] = list(tv)
                gap_pool = gap_pools[attribute.name, source]
                if gap_pool.codes.size:
                    gaps = _class_gap_draws(gap_pool, size, shift_draws, rng)
                    shifts.setdefault(null_key("class_mean_gap", source, attribute.name), {})[size] = list(gaps)
        if stage is not None:
            advance(stage, step + 1, total)
    nulls = {
        key: FigureNull.from_draws({s: np.array(v) for s, v in by_size.items()}) for key, by_size in shifts.items()
    }
    done = len(sizes)
    for attribute, guessed in zip(attributes, pseudo, strict=True):
        for source, codes in (("labels", attribute.codes), ("pseudo-labels", guessed)):
            null = _probe_null(x, erased, reference, attribute, codes, rng, sizes, probe_draws)
            if null is not None:
                nulls[null_key("leakage_gap", source, attribute.name)] = null
            done += 1
            if stage is not None:
                advance(stage, done, total)
    if context is not None and attributes:
        first = attributes[0]
        null = _probe_null(x, erased, reference, first, first.codes, rng, sizes, probe_draws, context)
        if null is not None:
            nulls[null_key("context_leakage_gap", "labels", first.name)] = null
        if stage is not None:
            advance(stage, total, total)
    return LiveCalibration(nulls, held_out_rows=rows)


@dataclass(frozen=True)
class GapPool:
    """The rows the class-mean gap is drawn from: their coordinates (shape (N, D)) and class codes (all ≥ 0)."""

    coordinates: NDArray[np.float64]
    codes: NDArray[np.intp]


def _gap_pool(coordinates: NDArray[np.float64], codes: NDArray[np.intp]) -> GapPool:
    """The pool's labelled rows, each class's offset from the overall mean scaled to the population's.

    The pool's class means lie apart by the population's class-mean gap after
    erasure (the fit's own error with labels, the pre-erasure probe's lean
    with pseudo-labels: what every live sample carries) plus the pool's own
    sampling noise (which no live sample carries; left in, it raised the
    pseudo-label curve of a 12-dimensional test population well above what
    fresh samples read).  With ``N`` rows and within-class covariances
    ``S_c`` the pool's squared gap exceeds the population's by
    ``Σ_c (1 − n_c / N) tr(S_c) / N`` on average; the offsets are scaled so
    that their squared gap is the pool's less that (none if it is less).
    """
    rows = codes >= 0
    kept, kept_codes = coordinates[rows], codes[rows]
    n = kept.shape[0]
    if n == 0:
        return GapPool(kept, kept_codes)
    overall = kept.mean(axis=0)
    classes = np.unique(kept_codes)
    offsets = {int(code): kept[kept_codes == code].mean(axis=0) - overall for code in classes}
    squared = sum(float(np.sum(kept_codes == code)) / n * float(np.sum(offsets[code] ** 2)) for code in offsets)
    noise = 0.0
    for code in offsets:
        members = kept[kept_codes == code]
        if members.shape[0] > 1:
            noise += (1 - members.shape[0] / n) * float(np.sum(members.var(axis=0, ddof=1))) / n
    scale = float(np.sqrt(max(0.0, squared - noise) / squared)) if squared > 0 else 1.0
    moved = kept.copy()
    for code, offset in offsets.items():
        moved[kept_codes == code] -= (1 - scale) * offset
    return GapPool(moved, kept_codes)


def class_gap_draws(pool: GapPool, counts: NDArray[np.float64]) -> NDArray[np.float64]:
    """The class-mean gap of bootstrap draws: each row of ``counts`` (shape (B, N)) how often each row is drawn.

    :func:`veil.checks.drift.class_mean_gap` of the drawn rows, from sums
    weighted by the counts, so that no draw is materialised.
    """
    n = counts.sum(axis=1)
    overall = counts @ pool.coordinates / n[:, None]
    total = np.zeros(counts.shape[0])
    for code in np.unique(pool.codes):
        weights = counts[:, pool.codes == code]
        n_class = weights.sum(axis=1)
        sums = weights @ pool.coordinates[pool.codes == code]
        present = n_class > 0
        means = np.divide(sums, n_class[:, None], out=np.zeros_like(sums), where=present[:, None])
        total += np.where(present, n_class / n * np.sum((means - overall) ** 2, axis=1), 0.0)
    return np.asarray(np.sqrt(total))


def _class_gap_draws(pool: GapPool, size: int, draws: int, rng: np.random.Generator) -> NDArray[np.float64]:
    """``draws`` bootstrap samples of ``size`` rows of the pool, their class-mean gaps."""
    rows = pool.codes.size
    counts = np.stack([np.bincount(rng.integers(0, rows, size), minlength=rows) for _ in range(draws)])
    return class_gap_draws(pool, counts.astype(np.float64))


def _given(codes: NDArray[np.intp]) -> Callable[[NDArray[np.floating]], NDArray[np.intp]]:
    """The codes of a draw, as :func:`check_drift` takes labels given with a sample."""
    return lambda _: codes


def _probe_null(
    x: NDArray[np.float64],
    erased: NDArray[np.floating],
    reference: ReferenceStatistics,
    attribute: DrawnAttribute,
    codes: NDArray[np.intp],
    rng: np.random.Generator,
    sizes: tuple[int, ...],
    draws: int,
    context: NDArray[np.str_] | None = None,
) -> FigureNull | None:
    """The leakage statistic (probe accuracy − majority) of draws without replacement (None: too few rows).

    With ``context``, the statistic within the context instead: the linear probe trained and tested within
    each value, pooled by rows, its accuracy above the floor (as :func:`check_drift` reads a posted context).
    """
    pool = np.flatnonzero(codes >= 0)
    by_size: dict[int, NDArray[np.float64]] = {}
    widen: dict[int, float] = {}
    for size in probe_sizes(pool.size, sizes):
        values = []
        for _ in range(draws):
            rows_drawn = np.sort(rng.choice(pool, size, replace=False))
            drawn_codes = codes[rows_drawn]
            if context is not None:
                within = context_audit(
                    x[rows_drawn], erased[rows_drawn], drawn_codes, context[rows_drawn],
                    classes=tuple(attribute.classes), column=None, folds=PROBE_FOLDS, nonlinear=False, random_state=0,
                )  # fmt: skip
                if within.after:
                    values.append(within.after["linear"].accuracy - within.after["linear"].majority)
                continue
            figures = _class_figures(
                x[rows_drawn], erased[rows_drawn], erased_coordinates(erased[rows_drawn], reference),
                attribute.classes, attribute.priors,
                _given(drawn_codes), 0,
            )  # fmt: skip
            if figures.leakage is not None:
                values.append(figures.leakage["accuracy"] - figures.leakage["majority"])
        if len(values) >= 3:
            by_size[size] = np.array(values)
            widen[size] = float(np.sqrt((pool.size - 1) / (pool.size - size)))
    return FigureNull.from_draws(by_size, spread_factor=widen) if by_size else None
