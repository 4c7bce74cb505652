"""Held-out probes of the attribute, scored fold by fold: the linear and MLP probes and the scoring itself.

The other nonlinear probes are in :mod:`veil.audit.readers`.
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np
from numpy.typing import NDArray
from sklearn.base import clone
from sklearn.dummy import DummyRegressor
from sklearn.exceptions import ConvergenceWarning
from sklearn.linear_model import LogisticRegression, RidgeCV
from sklearn.metrics import mean_absolute_error, r2_score
from sklearn.model_selection import BaseCrossValidator, KFold, StratifiedGroupKFold, StratifiedKFold
from sklearn.neural_network import MLPClassifier
from sklearn.pipeline import Pipeline, make_pipeline
from sklearn.preprocessing import StandardScaler
from threadpoolctl import threadpool_limits

from veil.audit.report import ProbeScore, RegressionScore
from veil.audit.stats import wilson_interval
from veil.erasers.scaling import DEAD_SPREAD
from veil.progress import advance

# Resamples of the held-out rows behind a regression probe's intervals, drawn this many at a time.
BOOTSTRAP_ROUNDS = 1000
BOOTSTRAP_BLOCK = 100


def dead_features(x: NDArray[np.floating]) -> NDArray[np.intp]:
    """The coordinates whose spread is below ``DEAD_SPREAD`` of the typical spread, in increasing order.

    The probes standardise every coordinate, as a downstream model would, so
    they read whatever such a coordinate carries at rounding level: the audit
    names these coordinates so that a reading there can be traced.
    """
    spread = np.asarray(x, dtype=np.float64).std(axis=0)
    typical = float(np.sqrt(np.mean(spread**2)))
    return np.flatnonzero(spread < DEAD_SPREAD * typical)


def linear_probe(random_state: int) -> Pipeline:
    return make_pipeline(StandardScaler(), LogisticRegression(max_iter=3000, random_state=random_state))


def nonlinear_probe(random_state: int) -> Pipeline:
    return make_pipeline(
        StandardScaler(),
        MLPClassifier(
            hidden_layer_sizes=(128,),
            alpha=1e-3,
            early_stopping=True,
            max_iter=300,
            random_state=random_state,
        ),
    )


def held_out_predictions(
    model: Any,
    x: NDArray[np.floating],
    y: NDArray[Any],
    splitter: BaseCrossValidator,
    *,
    stage: str | None = None,
    groups: NDArray[np.intp] | None = None,
) -> NDArray[Any]:
    """What ``cross_val_predict`` returns (each row predicted by a clone fitted on the other folds), fold by fold.

    Fold by fold so that each finished fold can be reported to ``stage``.
    BLAS and OpenMP run on one thread meanwhile: a probe multiplies matrices
    of a few hundred rows, where a second thread's start-up and spin-waiting
    cost more than it adds (on a busy 2-core machine the MLP probe ran 4-9
    times slower with two BLAS threads, and the boosted trees 2-4 times slower
    with two OpenMP threads, with the same result).
    """
    folds = list(splitter.split(x, y, groups))
    parts = []
    with warnings.catch_warnings(), threadpool_limits(limits=1):
        warnings.simplefilter("ignore", ConvergenceWarning)
        for done, (train, test) in enumerate(folds, start=1):
            parts.append((test, np.asarray(clone(model).fit(x[train], y[train]).predict(x[test]))))
            if stage is not None:
                advance(stage, done, len(folds))
    first = parts[0][1]
    predicted = np.empty((y.shape[0], *first.shape[1:]), dtype=first.dtype)
    for test, values in parts:
        predicted[test] = values
    return predicted


def score_predictions(codes: NDArray[np.intp], predicted: NDArray[np.intp]) -> ProbeScore:
    """Accuracy (with its Wilson interval), majority baseline, per-class recall and balanced accuracy.

    ``codes`` are ``0 .. classes - 1`` with every class present; the
    balanced accuracy is the mean of the per-class recalls.
    """
    counts = np.bincount(codes)
    right = np.bincount(codes[predicted == codes], minlength=counts.size)
    recall = right / counts
    hits = int(right.sum())
    low, high = wilson_interval(hits, codes.size)
    return ProbeScore(
        accuracy=hits / codes.size,
        balanced_accuracy=float(np.mean(recall)),
        majority=float(counts.max() / codes.size),
        interval_low=low,
        interval_high=high,
        n=int(codes.size),
        recall=tuple(float(r) for r in recall),
    )


def probe_folds(codes: NDArray[np.intp], folds: int) -> int:
    """Stratified folds the smallest class allows (at most ``folds``); refuses fewer than 2."""
    smallest = int(np.bincount(codes).min())
    if smallest < 2:
        raise ValueError(
            f"every class needs at least 2 held-out rows to probe leakage; the smallest class has {smallest}"
        )
    return min(folds, smallest)


def classification_score(
    model: Any,
    x: NDArray[np.floating],
    codes: NDArray[np.intp],
    *,
    folds: int,
    random_state: int,
    stage: str | None = None,
    groups: NDArray[np.intp] | None = None,
) -> ProbeScore:
    """Cross-validated held-out accuracy of ``model`` predicting ``codes`` from ``x``.

    Every row is predicted by a probe that never saw it; the majority
    baseline is the accuracy of always predicting the commonest class.
    Finished folds are reported to ``stage`` (see :mod:`veil.progress`).
    """
    predicted = cross_val_labels(model, x, codes, folds=folds, random_state=random_state, stage=stage, groups=groups)
    return score_predictions(codes, predicted)


def cross_val_labels(
    model: Any,
    x: NDArray[np.floating],
    codes: NDArray[np.intp],
    *,
    folds: int,
    random_state: int,
    stage: str | None = None,
    groups: NDArray[np.intp] | None = None,
) -> NDArray[np.intp]:
    """Held-out predictions of ``model`` for every row (for task probes).

    With ``groups`` (each row's group, ``0 .. groups - 1``) the folds keep every group in one fold
    (:func:`fold_splitter`).
    """
    splitter = fold_splitter(codes, folds, random_state=random_state, groups=groups)
    return held_out_predictions(model, x, codes, splitter, stage=stage, groups=groups)


def fold_splitter(
    codes: NDArray[np.intp], folds: int, *, random_state: int, groups: NDArray[np.intp] | None = None
) -> BaseCrossValidator:
    """Stratified folds (:func:`probe_folds` of them), or stratified group folds that keep each group in one fold.

    Group folds number at most the groups that carry the rarest class (:func:`group_folds`), so each class can
    reach every fold's training part.
    """
    if groups is None:
        return StratifiedKFold(n_splits=probe_folds(codes, folds), shuffle=True, random_state=random_state)
    return StratifiedGroupKFold(n_splits=group_folds(codes, groups, folds), shuffle=True, random_state=random_state)


def group_folds(codes: NDArray[np.intp], groups: NDArray[np.intp], folds: int) -> int:
    """Group folds the rows allow (at most ``folds``): no more than the groups of the class in fewest groups.

    Refuses fewer than 2, naming the class: a class carried by one group is, in any fold that holds that group,
    absent from the training part, so no reader learns it from other people.
    """
    present = np.unique(codes)
    carriers = [np.unique(groups[codes == c]).size for c in present]
    fewest = int(np.argmin(carriers))
    if carriers[fewest] < 2:
        raise ValueError(
            f"class code {int(present[fewest])} is carried by {carriers[fewest]} group; group folds need every class "
            "in at least 2 groups (audit without the group column, or with more groups)"
        )
    return min(probe_folds(codes, folds), carriers[fewest])


def first_fold(
    codes: NDArray[np.intp], folds: int, random_state: int, *, groups: NDArray[np.intp] | None = None
) -> NDArray[np.intp]:
    """The rows of the first test fold of :func:`cross_val_labels`' folds (the same ``groups``), in increasing order."""
    splitter = fold_splitter(codes, folds, random_state=random_state, groups=groups)
    return np.sort(next(iter(splitter.split(np.zeros((codes.size, 1)), codes, groups)))[1])


def regression_score(
    x: NDArray[np.floating],
    target: NDArray[np.float64],
    *,
    folds: int,
    random_state: int,
    model: Any = None,
    stage: str | None = None,
) -> RegressionScore:
    """Cross-validated held-out R² and mean absolute error of a regression probe, with bootstrap intervals.

    Parameters
    ----------
    x : ndarray of shape (n, d)
    target : ndarray of shape (n, m)
        The continuous attribute (R² and MAE are averaged over its columns, as scikit-learn's ``r2_score``).
    model : regressor, optional
        The probe; a ridge regression on standardised features (:func:`ridge_probe`) by default.

    Returns
    -------
    RegressionScore
        With the mean predictor's MAE on the same folds (each fold's training mean).
    """
    splitter = KFold(n_splits=min(folds, target.shape[0]), shuffle=True, random_state=random_state)
    probe = ridge_probe() if model is None else model
    predicted = held_out_predictions(probe, x, target, splitter, stage=stage).reshape(target.shape)
    baseline = held_out_predictions(DummyRegressor(), x, target, splitter).reshape(target.shape)
    r2_low, r2_high, mae_low, mae_high = bootstrap_intervals(target, predicted, random_state=random_state)
    return RegressionScore(
        r2=float(r2_score(target, predicted)),
        n=int(target.shape[0]),
        r2_low=r2_low,
        r2_high=r2_high,
        mae=float(mean_absolute_error(target, predicted)),
        mae_low=mae_low,
        mae_high=mae_high,
        mae_baseline=float(mean_absolute_error(target, baseline)),
    )


def ridge_probe() -> Pipeline:
    """Ridge regression on standardised features, its strength chosen by efficient leave-one-out."""
    return make_pipeline(StandardScaler(), RidgeCV(alphas=np.logspace(-3, 3, 13)))


def bootstrap_intervals(
    target: NDArray[np.float64], predicted: NDArray[np.float64], *, random_state: int
) -> tuple[float, float, float, float]:
    """95% percentile intervals of R² and MAE over :data:`BOOTSTRAP_ROUNDS` resamples of the rows.

    Returns ``(r2_low, r2_high, mae_low, mae_high)``; both figures are averaged
    over the target's columns, as :func:`sklearn.metrics.r2_score` does.
    """
    rng = np.random.default_rng(random_state)
    n = target.shape[0]
    t = target.reshape(n, -1)
    p = predicted.reshape(n, -1)
    r2s, maes = [], []
    for start in range(0, BOOTSTRAP_ROUNDS, BOOTSTRAP_BLOCK):
        rows = rng.integers(0, n, size=(min(BOOTSTRAP_BLOCK, BOOTSTRAP_ROUNDS - start), n))
        drawn, guessed = t[rows], p[rows]
        residual = np.sum((drawn - guessed) ** 2, axis=1)
        spread = np.sum((drawn - drawn.mean(axis=1, keepdims=True)) ** 2, axis=1)
        # A resample whose column is constant has no R² (scikit-learn's convention there is 0 or 1); it is skipped.
        with np.errstate(divide="ignore", invalid="ignore"):
            r2 = np.where(spread > 0, 1.0 - residual / spread, np.nan).mean(axis=1)
        r2s.append(r2)
        maes.append(np.abs(drawn - guessed).mean(axis=(1, 2)))
    r2_all, mae_all = np.concatenate(r2s), np.concatenate(maes)
    r2_all = r2_all[np.isfinite(r2_all)]
    r2_low, r2_high = np.percentile(r2_all, [2.5, 97.5]) if r2_all.size else (np.nan, np.nan)
    mae_low, mae_high = np.percentile(mae_all, [2.5, 97.5])
    return float(r2_low), float(r2_high), float(mae_low), float(mae_high)
