"""What every veil eraser shares: validation, transform, export; and what the linear ones share on top."""

from __future__ import annotations

from abc import abstractmethod
from typing import Any, ClassVar

import numpy as np
from numpy.typing import ArrayLike, NDArray
from sklearn import get_config
from sklearn.base import BaseEstimator, TransformerMixin
from sklearn.utils.metadata_routing import UNUSED
from sklearn.utils.validation import check_is_fitted, validate_data

from veil.maps.artifact import MapArtifact, finish_rows
from veil.maps.attribute import EncodedAttribute, encode_attribute
from veil.maps.kinds import EmbeddingMap
from veil.maps.linalg import dead_coordinates
from veil.maps.lowrank import AffineLowRankMap
from veil.maps.moments import MomentState
from veil.maps.pins import CoordinatePins

FLOAT_DTYPES = (np.float64, np.float32)


class Erasure(TransformerMixin, BaseEstimator):  # type: ignore[misc]
    """Base class of every eraser: fitted on rows and their attribute, it holds a map of some kind.

    Subclasses end ``fit`` with :meth:`_set_map` (which sets ``map_``, an
    :class:`~veil.maps.kinds.EmbeddingMap`; ``moments_``, raw-space statistics
    of the fitting data, which the live checks compare traffic to; and
    ``pins_``), set ``classes_`` and ``n_features_in_``, and implement
    :meth:`counterfactual`.

    **In a scikit-learn pipeline** a step's ``fit`` receives the pipeline's
    ``y`` (the task) as its second argument, which an eraser would take for
    the attribute and erase.  Every eraser's ``fit`` (and ``partial_fit``)
    therefore also takes the attribute by keyword, ``attribute=``, which
    then wins over the second argument, and requests it (and ``given=``)
    through scikit-learn's metadata routing::

        with sklearn.config_context(enable_metadata_routing=True):
            pipeline = make_pipeline(LEACE().set_fit_request(attribute=True), LogisticRegression())
            cross_val_score(pipeline, X, task, params={"attribute": z})

    Without routing, ``pipeline.fit(X, task, leace__attribute=z)`` passes it
    as a step parameter.  An eraser that requested the attribute and gets
    none refuses to fit; one that did not request it, in a pipeline given no
    attribute, erases the pipeline's ``y``: nothing in the call tells a task
    from an attribute.
    """

    # The second argument is not metadata to route: it is where a pipeline puts its y.
    __metadata_request__fit: ClassVar[dict[str, str]] = {"z": UNUSED}

    method: ClassVar[str]
    normalize: bool
    map_: EmbeddingMap
    moments_: MomentState
    pins_: CoordinatePins
    _requires_categorical: ClassVar[bool] = False

    def __sklearn_tags__(self) -> Any:
        tags = super().__sklearn_tags__()
        # The attribute z plays the role of y: no fit without it.
        tags.target_tags.required = True
        tags.transformer_tags.preserves_dtype = ["float64", "float32"]
        return tags

    def _attribute_to_erase(self, z: object, attribute: object, *, method: str = "fit") -> object:
        """The attribute a fit erases: ``attribute`` when given, else the positional ``z``.

        Inside a scikit-learn pipeline the positional argument is the
        pipeline's ``y``, the task: an attribute passed by keyword (routed by
        ``set_fit_request(attribute=True)``) therefore wins, and ``z`` is not
        read.  An eraser that requested the attribute by routing and did not
        receive it is refused rather than left to erase what ``z`` holds.
        """
        if attribute is not None:
            return attribute
        if get_config()["enable_metadata_routing"]:
            request = getattr(self.get_metadata_routing(), method).requests.get("attribute")
            # True, or an alias (a name the caller routes under); None, False and the markers ($WARN$...) are not.
            if request is True or (isinstance(request, str) and request.isidentifier()):
                alias = "attribute" if request is True else request
                raise ValueError(
                    f"{type(self).__name__} requests the attribute by routing ({method}: attribute={request!r}) but "
                    f"received none; pass it, e.g. params={{{alias!r}: z}}: the second argument is a pipeline's task"
                )
        return z

    def _validate_fit_input(
        self, x: ArrayLike, z: object, *, reset: bool
    ) -> tuple[NDArray[np.floating], EncodedAttribute]:
        array = validate_data(self, x, reset=reset, dtype=FLOAT_DTYPES, ensure_min_samples=1)
        return array, encode_attribute(z, array.shape[0], require_categorical=self._requires_categorical)

    def _set_map(self, mapping: EmbeddingMap, moments: MomentState) -> None:
        # Whatever the kind, coordinates the fitting data does not use leave as its mean (veil.maps.pins).
        self.map_ = mapping
        self.moments_ = moments
        self.pins_ = CoordinatePins.of_moments(moments)

    def _finish_rows(self, out: NDArray[np.floating]) -> NDArray[np.floating]:
        # An eraser pickled before pins existed has none, and answers as such versions do.
        return finish_rows(out, normalize=bool(self.normalize), pins=getattr(self, "pins_", None))

    def transform(self, X: ArrayLike) -> NDArray[np.floating]:
        """Erase the attribute from each row.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)

        Returns
        -------
        X_erased : ndarray of shape (n_samples, n_features)
            float32 for float32 input, float64 otherwise; unit-length rows
            when ``normalize=True``; the coordinates without live spread in
            the fitting data (``pins_.coordinates``) hold its mean.
        """
        check_is_fitted(self, "map_")
        array = validate_data(self, X, reset=False, dtype=FLOAT_DTYPES)
        return self._finish_rows(self.map_.apply(array))

    @abstractmethod
    def counterfactual(self, X: ArrayLike, target: object) -> NDArray[np.floating]:
        """Erase, then give every row the attribute ``target`` (see the subclasses)."""

    def export(self) -> MapArtifact:
        """The fitted eraser as a :class:`MapArtifact` (for the registry and the service)."""
        check_is_fitted(self, "map_")
        return MapArtifact(
            method=self.method,
            params=self.get_params(deep=False),
            map=self.map_,
            normalize=bool(self.normalize),
            moments=self.moments_,
            history=list(getattr(self, "history_", [])),
            pins=getattr(self, "pins_", None),
        )


class LinearErasure(Erasure):
    """Base class of the linear erasers: a fitted one is an :class:`AffineLowRankMap`."""

    map_: AffineLowRankMap

    def _set_fitted(self, mapping: AffineLowRankMap, moments: MomentState) -> None:
        # A coordinate the fitting data does not use (an embedding model's dead coordinate) neither feeds nor
        # receives the removed component: the factors' entries there are rounding or a correlation at 1e-8 scale,
        # and they would mix that coordinate's rounding-level copy of the attribute into the others.  The pins
        # then write the fitting mean there.
        self._set_map(mapping.leaving_untouched(dead_coordinates(moments.covariance_xx)), moments)
        self.classes_ = moments.labels

    # -- the fitted map -------------------------------------------------
    @property
    def mean_(self) -> NDArray[np.float64]:
        """``μ``, the centring point of the map, shape (d,)."""
        check_is_fitted(self, "map_")
        return self.map_.mean

    @property
    def rank_(self) -> int:
        """Number of directions the eraser removes."""
        check_is_fitted(self, "map_")
        return self.map_.rank

    def _target_mean(self, target: object) -> NDArray[np.float64]:
        moments: MomentState = self.moments_
        if moments.blocks:
            return moments.conditional_mean(target)  # type: ignore[arg-type]
        if moments.labels is not None:
            matches = np.flatnonzero(moments.labels == np.asarray(target))
            if matches.size != 1:
                raise ValueError(f"unknown target class {target!r}; the classes are {moments.labels.tolist()}")
            return np.asarray(moments.class_means[matches[0]])
        value = np.asarray(target, dtype=np.float64).reshape(-1)
        if value.shape != moments.mean_z.shape or not np.all(np.isfinite(value)):
            raise ValueError(f"the target must be a finite attribute vector of length {moments.mean_z.size}")
        # E[x | z] under the linear model of x on z fitted by the same moments.
        # The slope Σ_xz Σ_zz⁺ through the attribute's whitening factors, so the same cut decides its rank.
        eigenvectors, scale = moments.attribute_whitening()
        whitened_offset = ((value - moments.mean_z) @ eigenvectors) * scale
        return np.asarray(moments.mean_x + moments.standardized_cross_covariance() @ whitened_offset)

    def counterfactual(self, X: ArrayLike, target: object) -> NDArray[np.floating]:
        """Erase, then give every row the attribute component of ``target``.

        ``x_cf = x' + U Vᵀ (μ_target - μ)``: a ranking re-run on ``x_cf`` is the
        ranking "as if" every row had the target class.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
        target : label, array-like of shape (m,), or mapping
            A class label for a categorical attribute; an attribute vector for
            a numeric one (its conditional mean comes from the linear
            regression of ``x`` on ``z``); for several attributes, a mapping
            of every attribute's name to its class or value.

        Returns
        -------
        X_cf : ndarray of shape (n_samples, n_features)
        """
        check_is_fitted(self, "map_")
        array = validate_data(self, X, reset=False, dtype=FLOAT_DTYPES)
        out = self.map_.apply(array)
        out += self.map_.shift_towards(self._target_mean(target)).astype(out.dtype)
        return self._finish_rows(out)


class MomentErasure(LinearErasure):
    """An eraser that is a function of :class:`MomentState` alone: chunked, merged or whole, the same."""

    @abstractmethod
    def _map_from_moments(self, moments: MomentState) -> AffineLowRankMap: ...

    @property
    def needs_class_moments(self) -> bool:
        """Whether fitting needs per-class co-moments (``MomentState.from_batch(..., by_class=True)``).

        Raises ``ValueError`` for parameters that cannot be fitted, so a
        fitting job can refuse them before it reads any rows.
        """
        return False

    __metadata_request__partial_fit: ClassVar[dict[str, str]] = {"z": UNUSED}

    def fit(self, X: ArrayLike, z: object = None, *, attribute: object = None, given: object = None) -> MomentErasure:
        """Fit the eraser.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
            Embeddings.
        z : array-like of shape (n_samples,) or (n_samples, m)
            Class labels of the attribute, or a numeric attribute matrix.
            Not read when ``attribute`` is given (in a pipeline it is the task).
        attribute : array-like of shape (n_samples,) or (n_samples, m), optional
            The attribute by keyword, as a pipeline routes it
            (``set_fit_request(attribute=True)``); it then replaces ``z``.
        given : array-like of shape (n_samples,), or mapping of str to such arrays, or 2-D table, optional
            Each row's context value (a query's category, an opening), or its
            value of each of several context columns (a mapping by name, a data
            frame): every attribute is then also guarded within every value of
            each column on its own, where a ranker compares items (see
            :mod:`veil.maps.given`).

        Returns
        -------
        self
        """
        by_class = self.needs_class_moments
        array, encoded = self._validate_fit_input(X, self._attribute_to_erase(z, attribute), reset=True)
        return self._fit_state(MomentState.from_batch(array, encoded, by_class=by_class, given=given))

    def partial_fit(
        self, X: ArrayLike, z: object = None, *, attribute: object = None, given: object = None
    ) -> MomentErasure:
        """Add a chunk of rows; after each call the eraser is that of all rows so far.

        Classes and context values may appear in any chunk.  Until two classes
        (and more rows than classes) have been seen, the eraser is not usable.
        ``z``, ``attribute`` and ``given`` as in :meth:`fit`.

        Returns
        -------
        self
        """
        by_class = self.needs_class_moments
        first = not hasattr(self, "moments_")
        array, encoded = self._validate_fit_input(
            X, self._attribute_to_erase(z, attribute, method="partial_fit"), reset=first
        )
        chunk = MomentState.from_batch(array, encoded, by_class=by_class, given=given)
        merged = chunk if first else self.moments_.merge(chunk)
        self.moments_ = merged
        try:
            merged.check_fittable()
        except ValueError:
            # Not enough seen yet: keep accumulating, but do not serve a map.
            if hasattr(self, "map_"):
                del self.map_
            return self
        self._set_fitted(self._map_from_moments(merged), merged)
        return self

    def fit_moments(self, moments: MomentState) -> MomentErasure:
        """Fit from precomputed (for example merged) moments.

        Parameters
        ----------
        moments : MomentState
            Statistics of all the fitting rows, e.g. the merge of per-worker states
            (with per-class co-moments where :attr:`needs_class_moments`).

        Returns
        -------
        self
        """
        if self.needs_class_moments and moments.class_comoments is None:
            raise ValueError(
                "these parameters need per-class co-moments: build the moments with MomentState.from_batch(..., "
                "by_class=True)"
            )
        self.n_features_in_ = moments.n_features
        return self._fit_state(moments)

    def _fit_state(self, moments: MomentState) -> MomentErasure:
        moments.check_fittable()
        self._set_fitted(self._map_from_moments(moments), moments)
        return self
