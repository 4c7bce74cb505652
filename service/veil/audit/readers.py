"""The probes the audit runs, as scikit-learn pipelines: linear, quadratic, RBF kernel, boosted trees and MLP.

Each reads the attribute a different way, so each finds traces the others
miss: the quadratic probe products of directions, the kernel probe local
structure, the trees thresholds on single coordinates and what holds in a
sub-population only.  Their sizes keep an audit of a few thousand rows to
seconds (``make bench``, B7).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray
from sklearn.base import BaseEstimator, ClassifierMixin, RegressorMixin, clone
from sklearn.decomposition import PCA
from sklearn.ensemble import HistGradientBoostingClassifier, HistGradientBoostingRegressor
from sklearn.kernel_approximation import Nystroem
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import train_test_split
from sklearn.pipeline import Pipeline, make_pipeline
from sklearn.preprocessing import PolynomialFeatures, StandardScaler

from veil.audit.probes import fold_splitter, linear_probe, nonlinear_probe, probe_folds
from veil.audit.report import PROBES

# Principal components the quadratic probe expands: 32 give 560 features (components and their pairwise
# products), few enough for a logistic regression on a thousand rows.  On the committed sample after LEACE
# 24 components read 0.977, 32 read 0.995 and 48 0.996 (fitted on half the rows, probed on the other half).
QUADRATIC_COMPONENTS = 32
# Nystroem landmarks of the kernel probe and its logistic regression's inverse penalty.  Measured the same
# way: 300 landmarks read 0.973, 500 read 0.989, 800 read 0.992 at 3 times 500's cost; with C=1, 300 read 0.916.
KERNEL_COMPONENTS = 500
KERNEL_C = 10.0
# Boosting rounds, step and bins of the trees: 32 bins and a step of 0.2 cost a fifth of the library's
# defaults (255 bins, 0.1) and read as much on the committed sample (0.958 against 0.955 after LEACE).
TREE_ROUNDS = 100
TREE_STEP = 0.2
TREE_BINS = 32
# The trees and the MLP stop early on a tenth of their training rows when every class has this many
# training rows (two or more per class in that tenth); below it they run all their rounds or epochs.
EARLY_STOP_ROWS = 20
# The trees learn from at most this many rows of each training fold (a stratified draw) and predict every
# held-out row: their cost grows with the rows (a 20,000-row audit spent 57 s in them, 5 times the MLP's;
# 14 s with this cap).
TREE_TRAINING_ROWS = 4000


@dataclass(frozen=True)
class FoldSizes:
    """Lower bounds on any training fold's rows and on its smallest class's rows, and the number of classes."""

    rows: int
    smallest_class: int
    classes: int


def fold_sizes(
    codes: NDArray[np.intp], folds: int, *, groups: NDArray[np.intp] | None = None, random_state: int = 0
) -> FoldSizes:
    """What every training fold of the audit's stratified folds holds at least.

    Stratified folds put at most ``ceil(n_c / folds)`` rows of class ``c`` in
    each test fold; the probes size their parts (components, a validation
    share) so that they fit every fold.  Group folds (``groups``) have no such
    bound (a large group fills a fold): their training parts are counted.
    """
    counts = np.bincount(codes)
    if groups is not None:
        splitter = fold_splitter(codes, folds, random_state=random_state, groups=groups)
        trained = [
            np.bincount(codes[train], minlength=counts.size) for train, _ in splitter.split(codes, codes, groups)
        ]
        return FoldSizes(
            rows=int(min(t.sum() for t in trained)),
            smallest_class=int(min(t.min() for t in trained)),
            classes=int(counts.size),
        )
    k = probe_folds(codes, folds)
    kept = counts - -(-counts // k)
    return FoldSizes(rows=int(kept.sum()), smallest_class=int(kept.min()), classes=int(counts.size))


class CappedFit(ClassifierMixin, BaseEstimator):  # type: ignore[misc]
    """Fit ``estimator`` on at most ``max_rows`` of the rows it is given (a stratified, seeded draw).

    Parameters
    ----------
    estimator : classifier
    max_rows : int
    random_state : int
    """

    def __init__(self, estimator: Any, *, max_rows: int, random_state: int) -> None:
        self.estimator = estimator
        self.max_rows = max_rows
        self.random_state = random_state

    def fit(self, X: NDArray[np.floating], y: NDArray[np.intp]) -> CappedFit:
        rows = np.arange(y.shape[0])
        if rows.size > self.max_rows:
            rows = train_test_split(rows, train_size=self.max_rows, stratify=y, random_state=self.random_state)[0]
        self.estimator_ = clone(self.estimator).fit(X[rows], y[rows])
        self.classes_ = self.estimator_.classes_
        return self

    def predict(self, X: NDArray[np.floating]) -> NDArray[np.intp]:
        return np.asarray(self.estimator_.predict(X))


def _can_stop_early(sizes: FoldSizes) -> bool:
    """Whether a stratified tenth of the rows holds two rows of every class and one row per class at least."""
    return sizes.smallest_class >= EARLY_STOP_ROWS and sizes.rows // 10 >= sizes.classes


def quadratic_probe(random_state: int, *, sizes: FoldSizes, features: int) -> Pipeline:
    """Logistic regression on the leading principal components and all their pairwise products (degree 2)."""
    components = max(1, min(QUADRATIC_COMPONENTS, features, sizes.rows))
    return make_pipeline(
        StandardScaler(),
        PCA(n_components=components, random_state=random_state),
        PolynomialFeatures(degree=2, include_bias=False),
        StandardScaler(),
        LogisticRegression(max_iter=3000, random_state=random_state),
    )


def kernel_probe(random_state: int, *, sizes: FoldSizes) -> Pipeline:
    """Logistic regression on a Nystroem approximation of the RBF kernel (``gamma = 1 / features``)."""
    return make_pipeline(
        StandardScaler(),
        Nystroem(kernel="rbf", n_components=min(KERNEL_COMPONENTS, sizes.rows), random_state=random_state),
        LogisticRegression(C=KERNEL_C, max_iter=3000, random_state=random_state),
    )


def trees_probe(random_state: int, *, sizes: FoldSizes) -> Pipeline:
    """Gradient-boosted trees on histogram bins, on every coordinate (a split reads any scale, rounding included).

    They learn from at most :data:`TREE_TRAINING_ROWS` rows of a training fold.
    """
    # A stratified draw keeps each class's share, to within a row.
    share = min(1.0, TREE_TRAINING_ROWS / sizes.rows)
    drawn = FoldSizes(
        rows=int(sizes.rows * share), smallest_class=int(sizes.smallest_class * share) - 1, classes=sizes.classes
    )
    trees = HistGradientBoostingClassifier(
        learning_rate=TREE_STEP,
        max_iter=TREE_ROUNDS,
        max_bins=TREE_BINS,
        early_stopping=_can_stop_early(drawn),
        random_state=random_state,
    )
    return make_pipeline(CappedFit(trees, max_rows=TREE_TRAINING_ROWS, random_state=random_state))


class CappedRegression(RegressorMixin, BaseEstimator):  # type: ignore[misc]
    """Fit ``estimator`` on at most ``max_rows`` of the rows it is given (a seeded draw), one per target column.

    Parameters
    ----------
    estimator : regressor of one target
    max_rows : int
    random_state : int
    """

    def __init__(self, estimator: Any, *, max_rows: int, random_state: int) -> None:
        self.estimator = estimator
        self.max_rows = max_rows
        self.random_state = random_state

    def fit(self, X: NDArray[np.floating], y: NDArray[np.floating]) -> CappedRegression:
        rows = np.arange(y.shape[0])
        if rows.size > self.max_rows:
            rows = np.sort(np.random.default_rng(self.random_state).choice(rows, self.max_rows, replace=False))
        columns = np.asarray(y, dtype=np.float64).reshape(y.shape[0], -1)[rows]
        self.estimators_ = [clone(self.estimator).fit(X[rows], column) for column in columns.T]
        return self

    def predict(self, X: NDArray[np.floating]) -> NDArray[np.float64]:
        return np.column_stack([estimator.predict(X) for estimator in self.estimators_])


def trees_regression_probe(random_state: int) -> Pipeline:
    """Gradient-boosted regression trees for a continuous attribute, sized as :func:`trees_probe`."""
    trees = HistGradientBoostingRegressor(
        learning_rate=TREE_STEP, max_iter=TREE_ROUNDS, max_bins=TREE_BINS, early_stopping=False,
        random_state=random_state,
    )  # fmt: skip
    return make_pipeline(CappedRegression(trees, max_rows=TREE_TRAINING_ROWS, random_state=random_state))


def build_probe(name: str, random_state: int, *, sizes: FoldSizes, features: int) -> Pipeline:
    """The probe ``name`` (one of :data:`veil.audit.report.PROBES`) sized for folds of ``sizes``."""
    if name == "linear":
        return linear_probe(random_state)
    if name == "quadratic":
        return quadratic_probe(random_state, sizes=sizes, features=features)
    if name == "kernel":
        return kernel_probe(random_state, sizes=sizes)
    if name == "trees":
        return trees_probe(random_state, sizes=sizes)
    if name == "mlp":
        mlp = nonlinear_probe(random_state)
        return mlp if _can_stop_early(sizes) else mlp.set_params(mlpclassifier__early_stopping=False)
    raise ValueError(f"unknown probe {name!r}; choose one of {', '.join(PROBES)}")
