"""Class-conditional Gaussian transport: every class's Gaussian carried onto their common barycenter."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import replace
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from sklearn.covariance import ledoit_wolf_shrinkage
from sklearn.utils.validation import check_is_fitted, validate_data

from veil.erasers._base import FLOAT_DTYPES, Erasure
from veil.erasers._context_transport import fit_within_context
from veil.erasers._transport_parts import ClassFit, linear_classifier, transport_support
from veil.erasers.leace import LEACE
from veil.maps.attribute import check_enough_rows, check_positive_int
from veil.maps.context import checked_context
from veil.maps.context_transport import ContextTransportMap
from veil.maps.gaussians import barycenter_covariance, monge_matrix, require_positive_definite
from veil.maps.linalg import COVARIANCE_RTOL
from veil.maps.moments import MomentState
from veil.maps.transport import ClassTransportMap

Float64Array = NDArray[np.float64]


class GaussianTransport(Erasure):
    """Move each class's Gaussian onto the classes' 2-Wasserstein barycenter.

    Each class ``c`` is modelled as ``N(μ_c, Σ_c)`` within the support of the
    fitting data (directions with no spread are left as they are).  The
    barycenter ``N(μ, S)`` of the class Gaussians, weighted by the class
    shares, has the overall mean ``μ`` and the covariance ``S`` of the
    fixed-point iteration in :func:`veil.maps.gaussians.barycenter_covariance`;
    each class is carried onto it by the closed-form Monge map between
    Gaussians, ``T_c(x) = μ + A_c (x - μ_c)``.  On the fitting rows, moved
    with their own class's map and without shrinkage, every class then has
    the same mean and the same covariance: no reader of first or second
    moments tells the classes apart.

    **This map reads the attribute in order to remove it, and it is not
    affine.**  At apply time the class of a row is inferred by a stored
    linear (logistic) classifier, which takes the most probable class
    (``inference="hard"``) or averages the class maps by its probabilities
    (``inference="soft"``).  Where that classifier errs, a row is moved by
    the wrong class's map; where the attribute is hard to infer linearly,
    the map removes correspondingly less.

    **Within a context** (``fit(X, z, given=context)``), one such map is
    fitted on the rows of each context value, so within every value the
    classes coincide in mean and covariance, and a second stored classifier
    infers a row's value when it is cleaned (the service is not told it):
    a :class:`~veil.maps.context_transport.ContextTransportMap`.  The
    parameters apply to every value's map; ``then_leace`` then fits LEACE
    guarding within the context too.

    Parameters
    ----------
    shrinkage : "ledoit-wolf" or float, default="ledoit-wolf"
        Shrink each class covariance towards a multiple of the identity:
        the Ledoit-Wolf coefficient, or a fixed coefficient in [0, 1].  With
        0 every class needs more rows than the support has dimensions.
    inference : {"hard", "soft"}, default="hard"
        How the class of a row is taken at apply time.
    rank : int or None, default=None
        Directions of ``A_c - I`` kept per class, those that move the class's
        rows most (largest ``g² · Var``); ``None`` keeps all of the support.
        Applying costs about ``2·d·rank`` multiply-adds per row.
    then_leace : bool, default=False
        Fit LEACE on the transported fitting rows and apply it after the
        transport (it removes the linear trace the inference leaves); with
        a context, LEACE guarding within it as well.
    classifier_c : float, default=1.0
        Inverse L2 penalty of the stored logistic classifiers (on standardised features).
    max_iter : int, default=200
        Iterations of the barycenter's fixed point.
    tol : float, default=1e-10
        Relative Frobenius change at which the barycenter iteration stops.
    normalize : bool, default=False
        Re-normalise cleaned rows to unit length.
    random_state : int or None, default=None
        Seed of the classifier (for solvers that use one).

    Attributes
    ----------
    map_ : ClassTransportMap or ContextTransportMap
        The fitted map (the second with a context).
    moments_ : MomentState
        Statistics of the fitting data (for the live checks and the audit).
    classes_ : ndarray of shape (n_classes,)
    context_values_ : ndarray of shape (n_values,)
        With a context only: its values, in the order of the map's value maps.
    fallback_values_ : ndarray
        With a context only: the values moved by the population's map (too few rows of some class there).

    Without a context only:

    class_means_ : ndarray of shape (n_classes, n_features)
    barycenter_covariance_ : ndarray of shape (r, r)
        ``S`` in the support basis ``support_``.
    class_covariances_ : ndarray of shape (n_classes, r, r)
        The (shrunk) class covariances in the support basis.
    support_ : ndarray of shape (n_features, r)
        Orthonormal basis of the fitting data's support.
    shrinkage_ : ndarray of shape (n_classes,)
        The shrinkage coefficient used for each class.
    n_iter_ : int
        Iterations the barycenter took.
    n_features_in_ : int

    Examples
    --------
    >>> import numpy as np
    >>> from veil.erasers.transport import GaussianTransport
    >>> rng = np.random.default_rng(0)
    >>> z = rng.integers(0, 2, 2000)
    >>> X = rng.normal(size=(2000, 4)) * np.where(z[:, None] == 1, 2.0, 0.5) + 3.0 * z[:, None]
    >>> moved = GaussianTransport(shrinkage=0.0).fit(X, z).transform(X)
    >>> spread = [moved[z == c].std(axis=0).round(1) for c in (0, 1)]
    >>> bool(np.allclose(spread[0], spread[1], atol=0.1))
    True
    """

    method = "transport"
    _requires_categorical = True
    map_: ClassTransportMap | ContextTransportMap

    def __init__(
        self,
        *,
        shrinkage: Literal["ledoit-wolf"] | float = "ledoit-wolf",
        inference: Literal["hard", "soft"] = "hard",
        rank: int | None = None,
        then_leace: bool = False,
        classifier_c: float = 1.0,
        max_iter: int = 200,
        tol: float = 1e-10,
        normalize: bool = False,
        random_state: int | None = None,
    ) -> None:
        self.shrinkage = shrinkage
        self.inference = inference
        self.rank = rank
        self.then_leace = then_leace
        self.classifier_c = classifier_c
        self.max_iter = max_iter
        self.tol = tol
        self.normalize = normalize
        self.random_state = random_state

    def _check_params(self) -> None:
        if self.shrinkage != "ledoit-wolf" and not (
            isinstance(self.shrinkage, (int, float))
            and not isinstance(self.shrinkage, bool)
            and 0 <= self.shrinkage <= 1
        ):
            raise ValueError(f"shrinkage must be 'ledoit-wolf' or a number in [0, 1], got {self.shrinkage!r}")
        if self.inference not in ("hard", "soft"):
            raise ValueError(f"inference must be 'hard' or 'soft', got {self.inference!r}")
        if self.rank is not None:
            check_positive_int("rank", self.rank)
        check_positive_int("max_iter", self.max_iter)
        if not (isinstance(self.classifier_c, (int, float)) and self.classifier_c > 0):
            raise ValueError(f"classifier_c must be a positive number, got {self.classifier_c!r}")
        if not (isinstance(self.tol, (int, float)) and self.tol > 0):
            raise ValueError(f"tol must be a positive number, got {self.tol!r}")

    def _class_covariance(self, rows: Float64Array, label: object) -> tuple[Float64Array, float]:
        centred = rows - rows.mean(axis=0)
        covariance = centred.T @ centred / (rows.shape[0] - 1)
        if self.shrinkage == "ledoit-wolf":
            coefficient = float(ledoit_wolf_shrinkage(centred, assume_centered=True))
        else:
            coefficient = float(self.shrinkage)
        if coefficient > 0:
            level = float(np.trace(covariance)) / covariance.shape[0]
            covariance = (1 - coefficient) * covariance + coefficient * level * np.eye(covariance.shape[0])
        elif rows.shape[0] <= covariance.shape[0]:
            # Structural: fewer centred rows than dimensions cannot span them, whatever the values.
            raise ValueError(
                f"class {label!r} has {rows.shape[0]} rows for a {covariance.shape[0]}-dimensional support; "
                "its covariance is singular: use shrinkage"
            )
        require_positive_definite(covariance, f"the covariance of class {label!r}", rtol=COVARIANCE_RTOL)
        return covariance, coefficient

    def _class_directions(
        self, covariances: list[Float64Array], barycenter: Float64Array, support: Float64Array
    ) -> tuple[Float64Array, Float64Array]:
        """Each class's kept directions of ``A_c - I`` in the embedding space (C, d, k), and their gains (C, k)."""
        keep = support.shape[1] if self.rank is None else min(int(self.rank), support.shape[1])
        directions, gains = [], []
        for covariance in covariances:
            eigenvalues, eigenvectors = np.linalg.eigh(monge_matrix(covariance, barycenter) - np.eye(len(covariance)))
            # Order by how far each direction moves the class's rows: g² · Var_c along it.
            moved = eigenvalues**2 * np.einsum("ij,ik,kj->j", eigenvectors, covariance, eigenvectors)
            order = np.argsort(-moved, kind="stable")[:keep]
            directions.append(support @ eigenvectors[:, order])
            gains.append(eigenvalues[order])
        return np.stack(directions), np.stack(gains)

    def _fit_classes(self, x: Float64Array, codes: NDArray[np.intp], labels: NDArray[np.generic]) -> ClassFit:
        """The class-transport map of rows ``x`` (float64) with class codes ``codes`` into ``labels``."""
        mean = x.mean(axis=0)
        support = transport_support(x)
        inside = (x - mean) @ support
        counts = np.bincount(codes, minlength=labels.size)
        class_means = np.stack([inside[codes == c].mean(axis=0) for c in range(labels.size)])
        fitted = [self._class_covariance(inside[codes == c], labels[c]) for c in range(labels.size)]
        covariances = [covariance for covariance, _ in fitted]
        barycenter = barycenter_covariance(covariances, counts / counts.sum(), max_iter=self.max_iter, tol=self.tol)
        directions, gains = self._class_directions(covariances, barycenter.covariance, support)
        coef, intercept = linear_classifier(x, codes, c=float(self.classifier_c), random_state=self.random_state)
        transport_map = ClassTransportMap(
            mean=mean,
            class_means=mean + class_means @ support.T,
            directions=directions,
            gains=gains,
            classifier_coef=coef,
            classifier_intercept=intercept,
            priors=counts / counts.sum(),
            soft=self.inference == "soft",
        )
        shrinkage = np.array([coefficient for _, coefficient in fitted])
        return ClassFit(transport_map, np.stack(covariances), shrinkage, barycenter, support)

    def fit(
        self, X: ArrayLike, z: object = None, *, attribute: object = None, given: ArrayLike | None = None
    ) -> GaussianTransport:
        """Fit the class Gaussians, their barycenter, the class maps and the classifier.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
            Embeddings.
        z : array-like of shape (n_samples,)
            Class labels of the attribute (integers or strings).  Not read
            when ``attribute`` is given (in a pipeline it is the task).
        attribute : array-like of shape (n_samples,), optional
            The attribute by keyword, as a pipeline routes it
            (``set_fit_request(attribute=True)``); it then replaces ``z``.
        given : array-like of shape (n_samples,), optional
            Each row's context value (a field, a query's category): the
            classes are then transported within every value, by a map
            fitted on that value's rows, and a stored classifier infers a
            row's value when it is cleaned (see
            :mod:`veil.erasers._context_transport`).

        Returns
        -------
        self
        """
        self._check_params()
        array, encoded = self._validate_fit_input(X, self._attribute_to_erase(z, attribute), reset=True)
        labels = encoded.labels
        assert labels is not None  # require_categorical guarantees class labels
        check_enough_rows(array.shape[0], labels)
        codes = encoded.codes
        counts = np.bincount(codes, minlength=labels.size)
        if counts.min() < 2:
            smallest = labels[int(np.argmin(counts))]
            raise ValueError(f"every class needs at least 2 rows for a covariance; class {smallest!r} has 1")
        x = np.asarray(array, dtype=np.float64)
        self.classes_ = labels
        if given is None:
            self.moments_ = MomentState.from_batch(array, encoded)
            self._set_population_fit(x, codes, labels)
        else:
            if isinstance(given, Mapping) or getattr(given, "ndim", 1) == 2:
                raise ValueError("transport takes one context column: give the values of one column as a 1-D array")
            context = checked_context(np.asarray(given), array.shape[0])
            # With the per-value moments too: the card records the context's values and rows from them.
            self.moments_ = MomentState.from_batch(array, encoded, given=context)
            self._set_context_fit(x, codes, labels, context)
        return self

    def _set_population_fit(self, x: Float64Array, codes: NDArray[np.intp], labels: NDArray[np.generic]) -> None:
        fitted = self._fit_classes(x, codes, labels)
        transport_map = fitted.map
        if self.then_leace:
            after = LEACE().fit(transport_map.apply(x), codes).map_
            transport_map = replace(transport_map, after=after)
        self._set_map(transport_map, self.moments_)
        self.class_means_ = transport_map.class_means
        self.barycenter_covariance_ = fitted.barycenter.covariance
        self.class_covariances_ = fitted.covariances
        self.support_ = fitted.support
        self.shrinkage_ = fitted.shrinkage
        self.n_iter_ = fitted.barycenter.n_iter

    def _set_context_fit(
        self, x: Float64Array, codes: NDArray[np.intp], labels: NDArray[np.generic], context: NDArray[np.generic]
    ) -> None:
        fitted = fit_within_context(
            self._fit_classes, x, codes, labels, context, classifier_c=float(self.classifier_c),
            random_state=self.random_state,
        )  # fmt: skip
        context_map = fitted.map
        if self.then_leace:
            after = LEACE().fit(context_map.apply(x), codes, given=context).map_
            context_map = replace(context_map, after=after)
        self._set_map(context_map, self.moments_)
        self.context_values_ = context_map.values
        self.fallback_values_ = fitted.fallback_values

    def counterfactual(self, X: ArrayLike, target: object) -> NDArray[np.floating]:
        """Carry each row from its inferred class onto the Gaussian of class ``target``.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
        target : label
            One of ``classes_``.

        Returns
        -------
        X_cf : ndarray of shape (n_samples, n_features)
        """
        check_is_fitted(self, "map_")
        array = validate_data(self, X, reset=False, dtype=FLOAT_DTYPES)
        matches = np.flatnonzero(self.classes_ == np.asarray(target))
        if matches.size != 1:
            raise ValueError(f"unknown target class {target!r}; the classes are {self.classes_.tolist()}")
        return self._finish_rows(self.map_.counterfactual(array, self.moments_.class_means, int(matches[0])))
