"""Drift and leakage checks of a live traffic sample against a version's reference statistics.

Every figure is computed on raw live vectors (what the callers send) and on
their erased versions, in the fit's whitened units where a scale is needed,
and each shift figure is reported *beyond* what sampling alone produces for
a sample of that size, so a small quiet sample does not raise alarms:

- ``mean_shift``: ``‖W (μ_live − μ_fit)‖`` minus its no-drift expectation
  ``sqrt(r / n)`` and three standard deviations ``3 / sqrt(2n)``.
- ``covariance_shift``: ``‖W Σ_live Wᵀ − I‖_F / sqrt(r)`` minus its no-drift
  expectation ``sqrt((r + 1) / n)`` (Gaussian sampling).
- ``erased_variance_ratio``: live share of variance in the erased directions
  divided by the fitting data's share.
- ``prior_shift``: total-variation distance between the live class shares
  (labels, or the pre-erasure probe's pseudo-labels) and the fitted priors.
- ``leakage_gap``: a probe trained by cross-validation on the erased live
  sample to predict the labels (or pseudo-labels): how far the lower edge
  of its 95% interval lies above the majority baseline (0 at or below it:
  an overfit probe with nothing to read scores below majority, which is
  no leakage; see :attr:`veil.audit.report.ProbeScore.excess`).
- ``class_mean_gap``: how far the erased sample's class means (labels or
  pseudo-labels) lie from its overall mean, weighted by class counts, in the
  fit's units of spread (:func:`erased_coordinates`, :func:`class_mean_gap`).
  No probe: it reads one direction's worth of attribute a probe of a few
  hundred rows in many dimensions cannot find.
- ``context_leakage_gap`` (when the sample carries a context column): the
  same linear probe trained and tested within each value of the context,
  pooled by rows, its interval's lower edge above the floor (what the
  context alone tells); see :mod:`veil.audit.context_report`.  Without a
  context the figures are the population's only.
- ``ranking``: the ranking-fairness figures of :mod:`veil.audit.ranking`
  with (up to 500 of) the sample's rows querying the whole sample by cosine,
  raw and erased, against the sample's class shares (labels or
  pseudo-labels).  Figures only: no threshold reads them.

Two rules judge the figures.  A version stored with a calibration
(:mod:`veil.checks.calibration`) is judged by p-values against its own
no-drift draws at the sample's size, Holm-adjusted over the figures, at the
card's family-wise levels (``rule`` "calibrated"); the shift figures' p-values
read their raw values (``mean_shift_raw``, ``covariance_shift_raw``) and the
leakage's reads the probe's accuracy minus the majority baseline, unclipped.
A figure without a stored distribution (a continuous attribute's leakage,
the leakage within a context of a version fitted without one) keeps its
fixed band; ``class_mean_gap`` has no fixed band, so without a stored
distribution (a version stored before it was drawn) it is reported and
judged by neither rule, and the answer lists it in ``not_judged``.  A
version stored before
has no calibration and is judged by the fixed bands of
:class:`veil.checks.thresholds.AlertThresholds` (``rule`` "fixed levels").
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import asdict, dataclass, field, fields
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil.audit import probes
from veil.audit.context_report import ContextAudit
from veil.audit.ranking import ranking_before_after
from veil.audit.report import ProbeScore, RankingFairness
from veil.audit.within import context_audit
from veil.checks.calibration import (
    CALIBRATED,
    FIXED,
    JudgedFigure,
    LiveCalibration,
    judge_calibrated,
    null_key,
    reason_of,
)
from veil.checks.reference import ContinuousReference, ReferenceStatistics
from veil.checks.thresholds import AlertThresholds
from veil.checks.verdict import context_figures
from veil.maps.artifact import MapArtifact

MIN_ROWS = 20
PROBE_FOLDS = 5
#: Results per query of the ranking figures, and at most how many rows query (each query scans the whole sample).
RANKING_K = 10
RANKING_QUERIES = 500


@dataclass(frozen=True)
class DriftReport:
    """The figures of one drift check, and the status the thresholds give them."""

    rows: int
    labels: str  # "labels", "pseudo-labels" or "none"
    mean_shift: float
    mean_shift_raw: float
    covariance_shift: float
    covariance_shift_raw: float
    erased_variance_share: float
    erased_variance_ratio: float
    prior_shift: float | None
    class_shares: dict[str, float] | None
    leakage: dict[str, float] | None
    leakage_gap: float | None
    class_mean_gap: float | None
    status: str
    reasons: list[str] = field(default_factory=list)
    ranking: RankingFairness | None = None
    #: For a version of several attributes: each categorical one's labels source and figures, by name.
    attributes: dict[str, dict[str, Any]] | None = None
    #: The linear probe within each value of the posted context (None: no context was posted).
    context: ContextAudit | None = None
    context_leakage_gap: float | None = None
    #: Which rule judged the figures: "calibrated" (p-values against the version's own noise) or "fixed levels".
    rule: str = FIXED
    #: The calibrated rule's family-wise levels and correction (None under fixed levels).
    levels: dict[str, Any] | None = None
    #: Under the calibrated rule: each judged figure's p-value, and Holm-adjusted, by the figure's name in reasons.
    p_values: dict[str, float] | None = None
    adjusted_p_values: dict[str, float] | None = None
    #: Figures reported but judged by neither rule: a figure with no fixed band (``class_mean_gap``) and no
    #: stored no-drift draws (every version under fixed levels; a calibration stored before the figure was drawn).
    not_judged: list[str] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def check_drift(
    artifact: MapArtifact,
    reference: ReferenceStatistics,
    whitening: NDArray[np.float64],
    thresholds: AlertThresholds,
    raw: NDArray[np.floating],
    *,
    classes: list[str],
    labels: list[str] | dict[str, list[Any]] | None = None,
    context: list[Any] | None = None,
    random_state: int = 0,
    calibration: LiveCalibration | None = None,
) -> DriftReport:
    """Drift and leakage figures of a sample of raw live vectors (shape (n, d)), optionally with attribute labels.

    For a version of several attributes, ``labels`` may name each attribute's
    labels (a dict; a list is the first attribute's; numbers for a continuous
    one); every attribute without them is checked with its pre-erasure
    probe's pseudo-labels (pseudo-values for a continuous one).

    ``context`` gives each vector's value of a context column (a field, a
    query's category): the first categorical attribute's leakage is then also
    measured within each value (labels or pseudo-labels, as the headline's).

    ``calibration`` (the version's stored no-drift draws) judges the figures
    by p-values at family-wise levels; without it, ``thresholds``' fixed bands
    judge them.

    Raises
    ------
    ValueError
        Fewer than 20 rows, labels or context values of the wrong length, labels outside the fitted classes,
        or a context for a version without a categorical attribute.
    """
    x = np.asarray(raw, dtype=np.float64)
    n = x.shape[0]
    if n < MIN_ROWS:
        raise ValueError(f"a drift check needs at least {MIN_ROWS} vectors, got {n}")
    r = whitening.shape[1]
    white = (x - reference.mean) @ whitening
    live_mean = white.mean(axis=0)
    mean_raw = float(np.linalg.norm(live_mean))
    mean_noise = np.sqrt(r / n) + 3 / np.sqrt(2 * n)
    centred = white - live_mean
    covariance = centred.T @ centred / n
    covariance_raw = float(np.linalg.norm(covariance - np.eye(r)) / np.sqrt(r))
    covariance_noise = float(np.sqrt((r + 1) / n))

    erased = artifact.apply(np.asarray(raw))
    # The removed part itself, before any re-normalisation rescales what is left.
    removed = artifact.map.component(x)
    spread = float(np.sum((x - x.mean(axis=0)) ** 2))
    removed_centred = removed - removed.mean(axis=0)
    share = float(np.sum(removed_centred**2) / spread) if spread > 0 else 0.0
    ratio = share / reference.erased_variance_share if reference.erased_variance_share > 0 else 0.0

    by_attribute = labels if isinstance(labels, dict) else {}
    if by_attribute and not (reference.attributes or reference.continuous):
        raise ValueError("this version guards one attribute: give its labels as a list, not by attribute")
    if isinstance(labels, list) and not classes:
        raise ValueError("this version guards continuous attributes only: give their values by attribute")
    known = [attribute.name for attribute in reference.attributes]
    every = known + [attribute.name for attribute in reference.continuous]
    unknown_attributes = sorted(set(by_attribute) - set(every))
    if unknown_attributes:
        raise ValueError(f"{unknown_attributes[0]!r} is not an attribute of this version; attributes: {every}")
    # Class labels are compared as text, however the caller wrote them (age brackets numbered 0..3, say).
    by_attribute = {
        name: values if name not in known else [str(value) for value in values] for name, values in by_attribute.items()
    }
    if reference.attributes:
        headline_labels = by_attribute.get(known[0], labels if isinstance(labels, list) else None)
    else:
        headline_labels = labels if isinstance(labels, list) else None
    # A version whose attributes are all continuous has no classes: its figures are in ``attributes`` only.
    coordinates = erased_coordinates(erased, reference)
    headline = None if not classes else _class_figures(
        x, erased, coordinates, classes, reference.class_priors,
        _codes(headline_labels, classes, n, reference.probe_codes, what="label"), random_state,
    )  # fmt: skip
    source = "none" if headline is None else "labels" if headline_labels is not None else "pseudo-labels"
    attribute_figures: dict[str, dict[str, Any]] = {}
    for attribute in reference.attributes:
        attribute_classes = attribute.classes.tolist()
        given = by_attribute.get(attribute.name, headline_labels if attribute.name == known[0] else None)
        # The first attribute's figures are the headline's (its reference is the top-level one).
        figures_of = headline if headline is not None and attribute.name == known[0] else _class_figures(
            x, erased, coordinates, attribute_classes, attribute.class_priors,
            _codes(given, attribute_classes, n, attribute.probe_codes, what=f"{attribute.name} label"), random_state,
        )  # fmt: skip
        attribute_figures[attribute.name] = {
            "labels": "labels" if given is not None else "pseudo-labels",
            **figures_of.to_dict(),
        }
    for continuous in reference.continuous:
        attribute_figures[continuous.name] = _continuous_figures(
            x, erased, continuous, by_attribute.get(continuous.name), random_state
        )
    prior_shift = leakage_gap = mean_gap = None
    leakage = class_shares = ranking = None
    if context is not None and headline_labels is None:
        # Pseudo-labels are the stored probe's own guesses: within a value they would judge the probe, not the data.
        raise ValueError("a context needs the attribute's labels: post them with the sample (labels)")
    within = _within_context(x, np.asarray(erased), headline, context, random_state)
    if headline is not None:
        prior_shift, leakage, leakage_gap = headline.prior_shift, headline.leakage, headline.leakage_gap
        mean_gap = headline.class_mean_gap
        class_shares = {classes[i]: float(headline.shares[i]) for i in range(len(classes))}
        queries = None
        if n > RANKING_QUERIES:
            queries = np.sort(np.random.default_rng(random_state).choice(n, RANKING_QUERIES, replace=False))
        ranking = ranking_before_after(
            x, np.asarray(erased), headline.codes, RANKING_K, queries=queries, classes=len(classes)
        )

    figures = {
        "mean_shift": max(0.0, mean_raw - mean_noise),
        "covariance_shift": max(0.0, covariance_raw - covariance_noise),
        "erased_variance_ratio": ratio,
        "prior_shift": prior_shift,
        "leakage_gap": leakage_gap,
        "class_mean_gap": mean_gap,
        "context_leakage_gap": None if within is None else context_figures(within)["context_linear_gap"],
    }
    # Each judged figure: (prefix, figure, value, the unclipped statistic its p-value reads, its null's key).
    headline_name = known[0] if reference.attributes else ""
    statistics = {
        "mean_shift": mean_raw,
        "covariance_shift": covariance_raw,
        "erased_variance_ratio": ratio,
        "prior_shift": prior_shift,
        "leakage_gap": _excess(leakage),
        "class_mean_gap": mean_gap,
        "context_leakage_gap": _context_excess(within),
    }
    judged = [
        ("", figure, value, statistics.get(figure), _key_of(figure, source, headline_name))
        for figure, value in figures.items()
    ]
    # Every attribute of several is judged by the same bands (the first categorical one's figures are the headline's).
    judged += [
        (
            f"{name}: ",
            figure,
            entry[figure],
            _excess(entry.get("leakage")) if figure == "leakage_gap" else entry[figure],
            _key_of(figure, entry["labels"], name),
        )
        for name, entry in attribute_figures.items()
        if headline is None or name != known[0]
        for figure in ("prior_shift", "leakage_gap", "class_mean_gap")
        if figure in entry
    ]
    worst, reasons, judgement, unjudged = _judge(judged, thresholds, calibration, n)
    return DriftReport(
        rows=n,
        labels=source,
        mean_shift=figures["mean_shift"] or 0.0,
        mean_shift_raw=mean_raw,
        covariance_shift=figures["covariance_shift"] or 0.0,
        covariance_shift_raw=covariance_raw,
        erased_variance_share=share,
        erased_variance_ratio=ratio,
        prior_shift=prior_shift,
        class_shares=class_shares,
        leakage=leakage,
        leakage_gap=leakage_gap,
        class_mean_gap=mean_gap,
        status=worst,
        reasons=reasons,
        ranking=ranking,
        attributes=attribute_figures or None,
        context=within,
        context_leakage_gap=figures["context_leakage_gap"],
        rule=FIXED if calibration is None else CALIBRATED,
        levels=None if calibration is None else _levels(calibration),
        p_values=None if judgement is None else {f.figure: f.p_value for f in judgement if f.p_value is not None},
        adjusted_p_values=None
        if judgement is None
        else {f.figure: f.adjusted_p_value for f in judgement if f.adjusted_p_value is not None},
        not_judged=unjudged,
    )


def _excess(leakage: dict[str, float] | None) -> float | None:
    """The probe's accuracy above the majority baseline, unclipped: what a calibrated leakage p-value reads.

    None without a probe, or for a continuous attribute (its leakage is an R², which no draw calibrates).
    """
    if leakage is None or "accuracy" not in leakage:
        return None
    return leakage["accuracy"] - leakage["majority"]


def _context_excess(within: ContextAudit | None) -> float | None:
    """The linear probe's pooled accuracy within a context above the floor, unclipped (None: no context read)."""
    if within is None or "linear" not in within.after:
        return None
    return within.after["linear"].accuracy - within.after["linear"].majority


def _key_of(figure: str, source: str, attribute: str) -> str:
    """The stored null a figure is judged against (the class figures have one per labels source and attribute)."""
    if figure in ("prior_shift", "leakage_gap", "class_mean_gap", "context_leakage_gap"):
        return null_key(figure, source, attribute)
    return null_key(figure)


_FIXED_BANDS = frozenset(f.name for f in fields(AlertThresholds))


def _levels(calibration: LiveCalibration) -> dict[str, Any]:
    return {"warn": calibration.warn, "alert": calibration.alert, "correction": calibration.correction}


def _judge(
    judged: list[tuple[str, str, float | None, float | None, str]],
    thresholds: AlertThresholds,
    calibration: LiveCalibration | None,
    rows: int,
) -> tuple[str, list[str], list[JudgedFigure] | None, list[str]]:
    """The worst level, the reasons, (calibrated) every figure judged by a p-value, and the figures not judged.

    Under a calibration, the figures with a stored null are judged together
    (Holm across them); any other figure, or every figure without a
    calibration, by its fixed band.  A figure with neither (``class_mean_gap``
    has no fixed band: a level for it would have to know the sample size and
    the dimensions, which only the draws do) is judged by no rule.
    """
    calibrated: list[tuple[str, str, float, float]] = []
    fixed: list[tuple[str, str, float | None]] = []
    unjudged: list[str] = []
    for prefix, figure, value, statistic, key in judged:
        if value is None:
            continue
        if calibration is not None and statistic is not None and key in calibration.nulls:
            calibrated.append((f"{prefix}{figure}", key, value, statistic))
        elif figure in _FIXED_BANDS:
            fixed.append((prefix, figure, value))
        else:
            unjudged.append(f"{prefix}{figure}")
    reasons = []
    levels = []
    judgement = None
    if calibration is not None:
        judgement = judge_calibrated(calibration, rows, calibrated)
        for one in judgement:
            if one.level != "ok":
                reasons.append(reason_of(one, calibration))
                levels.append(one.level)
    for prefix, figure, value in fixed:
        band = getattr(thresholds, figure)
        level = band.level(value)
        if level != "ok":
            limit = band.warn if level == "warn" else band.alert
            # Within a calibrated check, a figure judged by its fixed band says so.
            rule = "" if calibration is None else ", fixed level"
            reasons.append(f"{prefix}{figure} {value:.3f} reaches {level} ({limit}{rule})")
            levels.append(level)
    worst = "alert" if "alert" in levels else "warn" if "warn" in levels else "ok"
    return worst, reasons, judgement, unjudged


def _within_context(
    x: NDArray[np.float64],
    erased: NDArray[np.floating],
    headline: _ClassFigures | None,
    context: list[Any] | None,
    random_state: int,
) -> ContextAudit | None:
    """The linear probe within each value of the posted context (None: no context posted)."""
    if context is None:
        return None
    if headline is None:
        raise ValueError("this version guards continuous attributes only: a context needs a categorical one")
    if not isinstance(context, list) or len(context) != x.shape[0]:
        count = len(context) if isinstance(context, list) else "no list of"
        raise ValueError(f"got {count} context values for {x.shape[0]} vectors")
    # Values are compared as text, however the caller wrote them (as class labels are).
    values = np.asarray([str(value) for value in context])
    return context_audit(
        x, erased, headline.codes, values, classes=tuple(headline.classes), column=None,
        folds=PROBE_FOLDS, nonlinear=False, random_state=random_state,
    )  # fmt: skip


def _continuous_figures(
    x: NDArray[np.float64],
    erased: NDArray[np.floating],
    reference: ContinuousReference,
    given: list[Any] | None,
    random_state: int,
) -> dict[str, Any]:
    """One continuous attribute's figures on a live sample: its shift, and what a ridge probe reads after erasure.

    ``value_shift`` is the live mean's distance from the fitted mean in fitted
    standard deviations (a figure only); ``leakage_gap`` is the lower edge of
    the erased rows' held-out R² interval above 0, judged like a categorical
    attribute's leakage gap.
    """
    n = x.shape[0]
    if given is None:
        values = reference.probe_values(x)
    else:
        if len(given) != n or not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in given):
            raise ValueError(f"the values of continuous attribute {reference.name!r} must be {n} numbers")
        values = np.asarray(given, dtype=np.float64)
        if not np.all(np.isfinite(values)):
            raise ValueError(f"the values of continuous attribute {reference.name!r} must be finite")
    score = probes.regression_score(np.asarray(erased), values[:, None], folds=PROBE_FOLDS, random_state=random_state)
    spread = reference.value_std
    return {
        "labels": "labels" if given is not None else "pseudo-values",
        "value_mean": float(values.mean()),
        "value_shift": abs(float(values.mean()) - reference.value_mean) / spread if spread > 0 else 0.0,
        "leakage": {
            "r2": score.r2,
            "r2_low": score.r2_low,
            "r2_high": score.r2_high,
            "mae": score.mae,
            "mae_baseline": score.mae_baseline,
        },
        "leakage_gap": max(0.0, score.r2_low if score.r2_low is not None else score.r2),
    }


def _codes(
    labels: list[str] | None,
    classes: list[str],
    n: int,
    pseudo: Callable[[NDArray[np.floating]], NDArray[np.intp]],
    *,
    what: str,
) -> Callable[[NDArray[np.floating]], NDArray[np.intp]]:
    """How each row's class code is found: from the labels given (checked), or from the pre-erasure probe."""
    if labels is None:
        return pseudo
    if not isinstance(labels, list) or len(labels) != n:
        raise ValueError(f"got {len(labels) if isinstance(labels, list) else 'no list of'} {what}s for {n} vectors")
    unknown = sorted(set(labels) - set(classes))
    if unknown:
        raise ValueError(f"{what} {unknown[0]!r} is not a class of this eraser; classes: {classes}")
    codes = np.array([classes.index(label) for label in labels], dtype=np.intp)
    return lambda _: codes


@dataclass(frozen=True)
class _ClassFigures:
    """One attribute's figures on a live sample: class shares, prior shift, probe leakage, class-mean gap."""

    codes: NDArray[np.intp]
    shares: NDArray[np.float64]
    classes: list[str]
    prior_shift: float
    leakage: dict[str, float] | None
    leakage_gap: float | None
    class_mean_gap: float | None

    def to_dict(self) -> dict[str, Any]:
        return {
            "prior_shift": self.prior_shift,
            "class_shares": {c: float(share) for c, share in zip(self.classes, self.shares, strict=True)},
            "leakage": self.leakage,
            "leakage_gap": self.leakage_gap,
            "class_mean_gap": self.class_mean_gap,
        }


def _class_figures(
    x: NDArray[np.float64],
    erased: NDArray[np.floating],
    coordinates: NDArray[np.float64],
    classes: list[str],
    priors: NDArray[np.float64],
    find_codes: Callable[[NDArray[np.floating]], NDArray[np.intp]],
    random_state: int,
) -> _ClassFigures:
    """``coordinates``: the erased rows as :func:`erased_coordinates` gives them (the class-mean gap reads them)."""
    n = x.shape[0]
    codes = find_codes(x)
    counts = np.bincount(codes, minlength=len(classes))
    shares = counts / n
    prior_shift = float(0.5 * np.abs(shares - priors).sum())
    leakage: dict[str, float] | None = None
    leakage_gap: float | None = None
    present = counts[counts > 0]
    if present.size >= 2 and present.min() >= 2:
        folds = min(PROBE_FOLDS, int(present.min()))
        _, compact = np.unique(codes, return_inverse=True)
        score: ProbeScore = probes.classification_score(
            probes.linear_probe(random_state), np.asarray(erased), compact, folds=folds, random_state=random_state
        )
        leakage = {
            "accuracy": score.accuracy,
            "majority": score.majority,
            "interval_low": score.interval_low,
            "interval_high": score.interval_high,
            "n": float(score.n),
        }
        leakage_gap = score.excess
    gap = class_mean_gap(coordinates, codes)
    return _ClassFigures(codes, shares, classes, prior_shift, leakage, leakage_gap, gap)


def erased_coordinates(erased: NDArray[np.floating], reference: ReferenceStatistics) -> NDArray[np.float64]:
    """Erased rows (shape (n, d)) in the fit's units of spread: shape (n, r) or (n, r + d).

    The first ``r`` columns are the rows whitened in the reference's leading
    directions (:meth:`ReferenceStatistics.whitening`).  The reference keeps
    only those eigenvectors but every eigenvalue, and a change along a
    direction of little variance lies mostly outside them (a random direction
    of the committed sample's 384 dimensions has about a quarter of its length
    within the 128 leading ones): the part of each row outside them follows,
    divided by the square root of the mean of the remaining eigenvalues that
    are not numerically zero.  A squared norm is then ``xᵀ C⁻¹ x`` for
    ``C = V Λ Vᵀ + σ² (I − V Vᵀ)``, the covariance with its leading
    directions kept and the rest at their average variance.  No rest (every
    direction kept, or the rest numerically zero): the whitened columns alone.
    """
    centred = np.asarray(erased, dtype=np.float64) - reference.mean
    whitening = reference.whitening()
    vectors = reference.eigenvectors
    values = reference.eigenvalues
    rest = values[vectors.shape[1] :]
    rest = rest[rest > values[0] * 1e-10] if values.size else rest
    lead = centred @ whitening
    if rest.size == 0:
        return np.asarray(lead)
    outside = centred - (centred @ vectors) @ vectors.T
    return np.hstack([lead, outside / np.sqrt(float(rest.mean()))])


def class_mean_gap(coordinates: NDArray[np.float64], codes: NDArray[np.intp]) -> float:
    """``sqrt(Σ_c (n_c / n) ‖m_c − m‖²)``: the class means' distance from the overall mean, weighted by class counts.

    Why weighted rather than the largest class's distance: under no drift a
    class mean of ``n_c`` rows lies about ``sqrt(D / n_c)`` from the overall
    mean in ``D`` coordinates, so the largest distance is that of the rarest
    class's noise, while a change carried by a share of every class moves each
    mean alike; weighting by ``n_c`` gives every class's noise the same size
    (``n · Σ_c (n_c / n) ‖m_c − m‖²`` is the between-class sum of squares, about
    chi-square with ``D (K − 1)`` degrees of freedom) and the change its full
    weight.  Measured on the committed sample's version guarding the pronoun
    and the age bracket (300-row samples of its 8,000 held-out rows, 400 no-drift
    draws per statistic, alert at p ≤ 0.001 / 9 as Holm reaches it): with 20% of
    the rows carrying the pronoun along a hidden direction at half the raw
    class-mean distance, both alerted 200 of 200 samples; at 2 standard
    deviations along that direction the weighted form alerted 200 of 200 and
    the largest distance 166 and 162 of 200 (labels, pseudo-labels).
    """
    present = np.unique(codes)
    overall = coordinates.mean(axis=0)
    n = coordinates.shape[0]
    total = 0.0
    for code in present:
        rows = coordinates[codes == code]
        total += rows.shape[0] / n * float(np.sum((rows.mean(axis=0) - overall) ** 2))
    return float(np.sqrt(total))
