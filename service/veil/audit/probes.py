"""Held-out probes of the attribute, scored fold by fold: the linear and MLP probes and the scoring itself.

The other nonlinear probes are in :mod:`veil.audit.readers`.
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np
from numpy.typing import NDArray
from sklearn.base import BaseEstimator, TransformerMixin, clone
from sklearn.exceptions import ConvergenceWarning
from sklearn.linear_model import LogisticRegression, RidgeCV
from sklearn.metrics import r2_score
from sklearn.model_selection import BaseCrossValidator, KFold, StratifiedKFold
from sklearn.neural_network import MLPClassifier
from sklearn.pipeline import Pipeline, make_pipeline
from threadpoolctl import threadpool_limits

from veil.audit.report import ProbeScore, RegressionScore
from veil.audit.stats import wilson_interval
from veil.erasers.scaling import DEAD_SPREAD, FlooredScaler
from veil.progress import advance


class LiveFeatures(TransformerMixin, BaseEstimator):  # type: ignore[misc]
    """Keep the coordinates whose spread is at least ``DEAD_SPREAD`` times the typical spread.

    For models that ignore scale (trees split on thresholds): flooring a
    dead coordinate's scale does not hide its rounding-level content from
    them, so it is dropped instead.
    """

    def fit(self, X: NDArray[np.floating], y: object = None) -> LiveFeatures:
        spread = np.asarray(X, dtype=np.float64).std(axis=0)
        typical = float(np.sqrt(np.mean(spread**2)))
        self.keep_ = np.flatnonzero(spread >= DEAD_SPREAD * typical)
        return self

    def transform(self, X: NDArray[np.floating]) -> NDArray[np.floating]:
        return np.asarray(X)[:, self.keep_]


def count_dead_features(x: NDArray[np.floating]) -> int:
    """Number of coordinates whose spread is below ``DEAD_SPREAD`` of the typical spread."""
    spread = np.asarray(x, dtype=np.float64).std(axis=0)
    typical = float(np.sqrt(np.mean(spread**2)))
    return int(np.count_nonzero(spread < DEAD_SPREAD * typical))


def linear_probe(random_state: int) -> Pipeline:
    return make_pipeline(FlooredScaler(), LogisticRegression(max_iter=3000, random_state=random_state))


def nonlinear_probe(random_state: int) -> Pipeline:
    return make_pipeline(
        FlooredScaler(),
        MLPClassifier(
            hidden_layer_sizes=(128,),
            alpha=1e-3,
            early_stopping=True,
            max_iter=300,
            random_state=random_state,
        ),
    )


def held_out_predictions(
    model: Any, x: NDArray[np.floating], y: NDArray[Any], splitter: BaseCrossValidator, *, stage: str | None = None
) -> NDArray[Any]:
    """What ``cross_val_predict`` returns (each row predicted by a clone fitted on the other folds), fold by fold.

    Fold by fold so that each finished fold can be reported to ``stage``.
    BLAS and OpenMP run on one thread meanwhile: a probe multiplies matrices
    of a few hundred rows, where a second thread's start-up and spin-waiting
    cost more than it adds (on a busy 2-core machine the MLP probe ran 4-9
    times slower with two BLAS threads, and the boosted trees 2-4 times slower
    with two OpenMP threads, with the same result).
    """
    folds = list(splitter.split(x, y))
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
) -> ProbeScore:
    """Cross-validated held-out accuracy of ``model`` predicting ``codes`` from ``x``.

    Every row is predicted by a probe that never saw it; the majority
    baseline is the accuracy of always predicting the commonest class.
    Finished folds are reported to ``stage`` (see :mod:`veil.progress`).
    """
    return score_predictions(
        codes, cross_val_labels(model, x, codes, folds=folds, random_state=random_state, stage=stage)
    )


def cross_val_labels(
    model: Any,
    x: NDArray[np.floating],
    codes: NDArray[np.intp],
    *,
    folds: int,
    random_state: int,
    stage: str | None = None,
) -> NDArray[np.intp]:
    """Held-out predictions of ``model`` for every row (for task probes)."""
    splitter = StratifiedKFold(n_splits=probe_folds(codes, folds), shuffle=True, random_state=random_state)
    return held_out_predictions(model, x, codes, splitter, stage=stage)


def regression_score(
    x: NDArray[np.floating], target: NDArray[np.float64], *, folds: int, random_state: int
) -> RegressionScore:
    """Cross-validated held-out R² of a ridge probe (mean over attribute columns)."""
    splitter = KFold(n_splits=min(folds, target.shape[0]), shuffle=True, random_state=random_state)
    model = make_pipeline(FlooredScaler(), RidgeCV(alphas=np.logspace(-3, 3, 13)))
    predicted = held_out_predictions(model, x, target, splitter)
    return RegressionScore(r2=float(r2_score(target, predicted)), n=int(target.shape[0]))
