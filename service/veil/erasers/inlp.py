"""INLP: iterative nullspace projection."""

from __future__ import annotations

import warnings
from collections.abc import Callable
from typing import Any, ClassVar

import numpy as np
from numpy.typing import ArrayLike, NDArray
from sklearn.base import clone
from sklearn.exceptions import ConvergenceWarning
from sklearn.linear_model import LogisticRegression
from sklearn.svm import LinearSVC
from sklearn.utils import check_random_state
from sklearn.utils.metadata_routing import UNUSED
from sklearn.utils.metaestimators import available_if

from veil.erasers._base import LinearErasure
from veil.erasers._discriminant import expected_accuracy, fit_discriminant
from veil.maps.attribute import EncodedAttribute, check_enough_rows, check_positive_int
from veil.maps.linalg import extend_basis, restrict_to_support
from veil.maps.lowrank import AffineLowRankMap
from veil.maps.moments import MomentState
from veil.progress import advance
from veil.samples.splitting import give_every_class_both_parts, holdout_mask

Float64Array = NDArray[np.float64]
# One INLP step: given the directions removed so far, train a classifier on
# what is left and return (its weight vectors as columns, held-out accuracy,
# held-out majority share).
Step = Callable[[Float64Array], tuple[Float64Array, float, float]]

CLASSIFIERS = ("logistic", "svm", "moments")


def _uses_moments(eraser: INLP) -> bool:
    return eraser.classifier == "moments"


class INLP(LinearErasure):
    """Iterative nullspace projection (INLP).

    Repeatedly trains a linear classifier of the attribute on the embeddings
    with the directions found so far projected out, and adds the classifier's
    weight vectors to those directions, until the classifier's accuracy on a
    held-out part of the fitting data is at most the majority share plus
    ``tol``.  The final map is the orthogonal projection off the union of all
    classifiers' row spaces (an orthonormal basis ``Q`` of the stacked weight
    vectors): ``U = V = Q``.

    By default one closing step follows: the class-mean offsets that remain
    after the classifiers' directions are removed (at most ``n_classes - 1``
    directions) are added to ``Q``, so the fitting data ends linearly guarded
    (its erased class means coincide, as after mean projection).  The
    stopping rule alone, judged on a held-out part of a few hundred rows,
    leaves signal behind on small samples: on the committed 384-dimensional
    sample a probe trained on the erased fitting rows still finds 0.08 above
    majority on other rows.  ``close_with_mean_projection=False`` gives the
    published procedure.

    Parameters
    ----------
    classifier : {"logistic", "svm", "moments"}, default="logistic"
        ``"logistic"``: scikit-learn ``LogisticRegression`` on standardised
        features.  ``"svm"``: ``LinearSVC``.  ``"moments"``: a regularised
        linear discriminant computed from running moments, whose held-out
        accuracy is the expected accuracy under Gaussian classes with the
        held-out moments; an iteration then costs O(d³) whatever the number
        of rows, and :meth:`partial_fit` is available.
    max_iter : int, default=20
        Upper bound on the number of classifiers trained.
    tol : float, default=0.02
        Stop once held-out accuracy ≤ majority share + ``tol``.
    patience : int, default=1
        How many classifiers in a row must meet the stopping rule before INLP
        stops.  Above 1, the directions of those classifiers are removed too:
        on small held-out parts one lucky classifier can meet the rule while
        signal remains, and waiting for several trades a little distortion
        for a more thorough erasure.
    validation_fraction : float, default=0.2
        Share of the fitting rows held out for the stopping rule, drawn by a
        seeded hash of the row index (see :func:`veil.samples.splitting.holdout_mask`).
    C : float, default=1.0
        Inverse regularisation strength of the logistic and SVM classifiers.
    regularization : float, default=0.01
        Ridge of the moments classifier, relative to the mean within-class variance.
    random_state : int or None, default=None
        Seeds the held-out split and the classifiers.
    close_with_mean_projection : bool, default=True
        End with the closing step described above.
    normalize : bool, default=False
        Re-normalise erased rows to unit length.

    Attributes
    ----------
    map_ : AffineLowRankMap
    moments_ : MomentState
        Statistics of all the fitting rows.
    history_ : list of dict
        One entry per classifier trained: ``iteration``, held-out
        ``accuracy``, held-out ``majority``, and ``rank`` (directions removed
        after that iteration).
    n_iter_ : int
        Number of classifiers trained.
    converged_ : bool
        Whether the stopping rule was met within ``max_iter``.
    closing_rank_ : int
        Directions the closing step added (0 without it).
    classes_ : ndarray of shape (n_classes,)
    n_features_in_ : int
    """

    method = "inlp"
    _requires_categorical = True
    # The second argument is where a pipeline puts its y, not metadata (as for fit, in Erasure).
    __metadata_request__partial_fit: ClassVar[dict[str, str]] = {"z": UNUSED}
    training_moments_: MomentState
    validation_moments_: MomentState

    def __init__(
        self,
        *,
        classifier: str = "logistic",
        max_iter: int = 20,
        tol: float = 0.02,
        patience: int = 1,
        validation_fraction: float = 0.2,
        C: float = 1.0,  # noqa: N803 - scikit-learn's name for this parameter
        regularization: float = 0.01,
        random_state: int | None = None,
        close_with_mean_projection: bool = True,
        normalize: bool = False,
    ) -> None:
        self.classifier = classifier
        self.max_iter = max_iter
        self.tol = tol
        self.patience = patience
        self.validation_fraction = validation_fraction
        self.C = C
        self.regularization = regularization
        self.random_state = random_state
        self.close_with_mean_projection = close_with_mean_projection
        self.normalize = normalize

    # -- parameters -----------------------------------------------------
    def _check_params(self) -> None:
        if self.classifier not in CLASSIFIERS:
            raise ValueError(f"classifier must be one of {CLASSIFIERS}, got {self.classifier!r}")
        check_positive_int("max_iter", self.max_iter)
        check_positive_int("patience", self.patience)
        if not 0.0 < self.validation_fraction < 1.0:
            raise ValueError(f"validation_fraction must be in (0, 1), got {self.validation_fraction}")
        if self.tol < 0:
            raise ValueError(f"tol must be non-negative, got {self.tol}")

    def _split_seed(self) -> int:
        return int(check_random_state(self.random_state).randint(0, 2**31 - 1))

    # -- fitting --------------------------------------------------------
    def fit(self, X: ArrayLike, z: object = None, *, attribute: object = None) -> INLP:
        """Fit the eraser.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
        z : array-like of shape (n_samples,)
            Class labels of the attribute.  Not read when ``attribute`` is
            given (in a pipeline it is the task).
        attribute : array-like of shape (n_samples,), optional
            The attribute by keyword, as a pipeline routes it
            (``set_fit_request(attribute=True)``); it then replaces ``z``.

        Returns
        -------
        self
        """
        z = self._attribute_to_erase(z, attribute)
        self._check_params()
        for stale in ("moments_", "validation_moments_", "training_moments_", "map_"):
            self.__dict__.pop(stale, None)
        if self.classifier == "moments":
            self.split_seed_ = self._split_seed()
            self.n_rows_seen_ = 0
            return self._accumulate(X, z, first=True, repair=True)
        array, attribute = self._validate_fit_input(X, z, reset=True)
        check_enough_rows(array.shape[0], attribute.labels)
        self.split_seed_ = self._split_seed()
        codes = attribute.codes
        held_out = give_every_class_both_parts(
            holdout_mask(array.shape[0], fraction=self.validation_fraction, seed=self.split_seed_), codes
        )
        moments = MomentState.from_batch(array, attribute)
        step = self._row_step(np.asarray(array, dtype=np.float64), codes, held_out, moments.mean_x)
        self._finish(step, moments)
        return self

    @available_if(_uses_moments)  # type: ignore[untyped-decorator]
    def partial_fit(self, X: ArrayLike, z: object = None, *, attribute: object = None) -> INLP:
        """Add a chunk of rows (``classifier="moments"`` only).

        Rows are assigned to the held-out part by their global index, so the
        result does not depend on how the rows are chunked.  ``z`` and
        ``attribute`` as in :meth:`fit`.

        Returns
        -------
        self
        """
        z = self._attribute_to_erase(z, attribute, method="partial_fit")
        self._check_params()
        first = not hasattr(self, "moments_")
        if first:
            self.split_seed_ = self._split_seed()
            self.n_rows_seen_ = 0
        return self._accumulate(X, z, first=first, repair=False)

    def _accumulate(self, X: ArrayLike, z: object, *, first: bool, repair: bool) -> INLP:
        array, attribute = self._validate_fit_input(X, z, reset=first)
        held_out = holdout_mask(
            array.shape[0], fraction=self.validation_fraction, seed=self.split_seed_, start=self.n_rows_seen_
        )
        if repair:
            # A whole in-memory fit may fix a small sample's split; a stream cannot.
            held_out = give_every_class_both_parts(held_out, attribute.codes)
        self.n_rows_seen_ += array.shape[0]
        train = MomentState.from_batch(array[~held_out], _rows(attribute, ~held_out))
        valid = MomentState.from_batch(array[held_out], _rows(attribute, held_out))
        if not first:
            train = self.training_moments_.merge(train)
            valid = self.validation_moments_.merge(valid)
        self.training_moments_ = train
        self.validation_moments_ = valid
        self.moments_ = train.merge(valid)
        if first:
            # A first chunk must itself be a valid fitting set when it is all there is.
            check_enough_rows(self.moments_.count, self.moments_.labels)
        if _has_classes(train) and _has_classes(valid):
            # A stream is expected to be unconverged until enough rows have
            # arrived; only a whole fit warns (scikit-learn's partial_fit
            # estimators do the same).
            self._finish(self._moment_step(train, valid), self.moments_, warn=repair)
        else:
            self.__dict__.pop("map_", None)
            if repair:
                raise ValueError(
                    "the held-out part and the rest must each contain every class; "
                    "give more rows or a larger validation_fraction"
                )
        return self

    def _row_step(
        self, x: Float64Array, codes: NDArray[np.intp], held_out: NDArray[np.bool_], mean: Float64Array
    ) -> Step:
        train_x, valid_x = x[~held_out] - mean, x[held_out] - mean
        train_y, valid_y = codes[~held_out], codes[held_out]
        if np.unique(train_y).size != np.unique(codes).size or np.unique(valid_y).size < 2:
            raise ValueError(
                "the held-out part and the rest must each contain every class; "
                "give more rows or a larger validation_fraction"
            )
        # Standardise with the fixed spread of the raw data so every iteration
        # is equally conditioned; weights map back to raw space by the scale.
        # Embedding models carry dead coordinates (MiniLM has values ~1e-33);
        # standardising those would turn rounding noise into "signal", so the
        # scale is floored at a millionth of the typical spread.
        scale = train_x.std(axis=0)
        scale = np.maximum(scale, 1e-6 * max(float(np.sqrt(np.mean(scale**2))), np.finfo(np.float64).tiny))
        majority = float(np.bincount(valid_y).max() / valid_y.size)
        template = self._classifier_template()

        def step(q: Float64Array) -> tuple[Float64Array, float, float]:
            model = clone(template)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", ConvergenceWarning)
                model.fit((train_x - (train_x @ q) @ q.T) / scale, train_y)
            accuracy = float(model.score((valid_x - (valid_x @ q) @ q.T) / scale, valid_y))
            weights = (np.atleast_2d(model.coef_) / scale).T
            if self.classifier == "logistic":
                weights = _decision_directions(weights)
            return weights, accuracy, majority

        return step

    def _classifier_template(self) -> Any:
        seed = self.split_seed_
        if self.classifier == "svm":
            return LinearSVC(C=self.C, max_iter=5000, random_state=seed)
        return LogisticRegression(C=self.C, solver="newton-cholesky", max_iter=100, random_state=seed)

    def _moment_step(self, train: MomentState, valid: MomentState) -> Step:
        majority = float(valid.class_priors.max())

        def step(q: Float64Array) -> tuple[Float64Array, float, float]:
            discriminant = fit_discriminant(train, q, regularization=self.regularization)
            return _decision_directions(discriminant.weights), expected_accuracy(discriminant, valid), majority

        return step

    def _finish(self, step: Step, moments: MomentState, *, warn: bool = True) -> None:
        d = moments.n_features
        q = np.zeros((d, 0))
        history: list[dict[str, float]] = []
        converged = False
        quiet = 0  # consecutive classifiers that met the stopping rule
        for iteration in range(self.max_iter):
            weights, accuracy, majority = step(q)
            advance("INLP classifiers", iteration + 1, self.max_iter)
            quiet = quiet + 1 if accuracy <= majority + self.tol else 0
            if quiet >= self.patience:
                history.append({"iteration": iteration, "accuracy": accuracy, "majority": majority, "rank": q.shape[1]})
                converged = True
                break
            grown = extend_basis(q, weights)
            history.append({"iteration": iteration, "accuracy": accuracy, "majority": majority, "rank": grown.shape[1]})
            if grown.shape[1] == q.shape[1] or grown.shape[1] >= d:
                q = grown
                break
            q = grown
        if warn and not converged:
            warnings.warn(
                f"INLP stopped after {len(history)} classifiers with held-out accuracy "
                f"{history[-1]['accuracy']:.3f} above majority {history[-1]['majority']:.3f} + tol; "
                "raise max_iter or check the data",
                ConvergenceWarning,
                stacklevel=3,
            )
        self.history_ = history
        self.n_iter_ = len(history)
        self.converged_ = converged
        found = q.shape[1]
        if self.close_with_mean_projection:
            # Whatever class-mean offset survives the classifiers' directions: (I - Q Qᵀ) Σ_xz, at most C - 1 of
            # them (Cov(x, z̃) has exactly that many columns), and none that only repeats Q up to rounding.
            q = extend_basis(q, moments.standardized_cross_covariance())
        q = restrict_to_support(q, moments.covariance_xx)
        self.closing_rank_ = max(q.shape[1] - found, 0)
        self._set_fitted(AffineLowRankMap(mean=moments.mean_x, u=q, v=q), moments)


def _decision_directions(weights: Float64Array) -> Float64Array:
    """The directions a classifier's argmax depends on, shape (d, C - 1) for ``C`` weight vectors.

    A softmax (or an argmax of scores) does not change when the same vector
    is added to every class's weights, so only differences between them
    matter, and for ``C`` classes those span ``C - 1`` directions.  The common
    part is fixed only by the penalty or by the priors (a moments
    discriminant's offsets sum to zero when weighted by the priors, not
    unweighted); kept, it would add a direction of rounding or solver noise.
    A binary scikit-learn model has one weight vector, already a difference.
    """
    if weights.shape[1] < 2:
        return weights
    return np.asarray(weights[:, 1:] - weights[:, :1])


def _rows(attribute: EncodedAttribute, mask: NDArray[np.bool_]) -> EncodedAttribute:
    return EncodedAttribute(labels=attribute.labels, matrix=attribute.matrix[mask])


def _has_classes(moments: MomentState) -> bool:
    """Every class of the state has rows, and there are at least two of them.

    Training and held-out states are merged chunk by chunk with the same
    label alignment, so they share their labels; this checks each has rows
    of every one.
    """
    return moments.count > 0 and moments.mean_z.size >= 2 and bool(np.all(moments.mean_z > 0))
