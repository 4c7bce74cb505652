"""Class transport fitted within each value of a context, and the classifier that infers the value when serving.

``GaussianTransport().fit(X, z, given=context)`` fits one class-transport
map per context value, on that value's rows alone, so within every value the
classes are carried onto that value's own barycenter.  A value with fewer
than :data:`MIN_VALUE_CLASS_ROWS` rows of some class of the attribute (a
field where every fitting row is "she", say) falls back to the population's
map, with a warning naming it: within such a value there is no class
covariance to estimate, and refusing would make a context with one lopsided
value unusable, while rows the service routes there (the context is
inferred, so rows of other values can land in it) still need moving.  The
fitting job applies its own small-cell rules before (see
:mod:`veil.fitting.job`): it refuses a cell of 1 to 4 rows and notes the rest.
"""

from __future__ import annotations

import warnings
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from veil.erasers._transport_parts import ClassFit, linear_classifier
from veil.maps.context_transport import ContextTransportMap
from veil.maps.transport import ClassTransportMap

Float64Array = NDArray[np.float64]

#: A class needs this many rows within a value for a covariance there (as over the population).
MIN_VALUE_CLASS_ROWS = 2

FitClasses = Callable[[Float64Array, NDArray[np.intp], NDArray[np.generic]], ClassFit]


@dataclass(frozen=True, eq=False)
class ContextFit:
    """The fitted context map, and the context values that use the population's map."""

    map: ContextTransportMap
    fallback_values: NDArray[np.generic]


def _value_map(
    fit_classes: FitClasses, x: Float64Array, codes: NDArray[np.intp], labels: NDArray[np.generic], value: object
) -> ClassTransportMap:
    try:
        return fit_classes(x, codes, labels).map
    except ValueError as error:
        raise ValueError(f"where the context is {value!r}: {error}") from None


def fit_within_context(
    fit_classes: FitClasses,
    x: Float64Array,
    codes: NDArray[np.intp],
    labels: NDArray[np.generic],
    context: NDArray[np.generic],
    *,
    classifier_c: float,
    random_state: int | None,
) -> ContextFit:
    """One class-transport map per context value, the population's where a value is too small, and the classifier.

    Parameters
    ----------
    fit_classes : callable
        ``fit_classes(x, codes, labels)`` fits a class-transport map on the rows given.
    x : ndarray of shape (n, d), float64
    codes : ndarray of shape (n,)
        Class index of each row into ``labels``.
    labels : ndarray of shape (C,)
    context : ndarray of shape (n,)
        Each row's context value.
    classifier_c : float
        Inverse L2 penalty of the context classifier (on standardised features).
    random_state : int or None
    """
    values, groups = np.unique(context, return_inverse=True)
    groups = groups.astype(np.intp)
    if values.size < 2:
        raise ValueError(f"the context has a single value ({values[0]!r}); fit without a context")
    population: ClassTransportMap | None = None
    maps, fallback = [], []
    for g, value in enumerate(values):
        rows = np.flatnonzero(groups == g)
        counts = np.bincount(codes[rows], minlength=labels.size)
        if counts.min() >= MIN_VALUE_CLASS_ROWS:
            maps.append(_value_map(fit_classes, x[rows], codes[rows], labels, value))
            continue
        if population is None:
            population = fit_classes(x, codes, labels).map
        maps.append(population)
        fallback.append(g)
    if fallback:
        named = ", ".join(repr(str(values[g])) for g in fallback)
        warnings.warn(
            f"context value(s) {named} have fewer than {MIN_VALUE_CLASS_ROWS} fitting rows of some class: rows "
            "inferred to be there are moved by the population's class transport",
            UserWarning,
            stacklevel=3,
        )
    coef, intercept = linear_classifier(x, groups, c=classifier_c, random_state=random_state)
    priors = np.bincount(groups, minlength=values.size) / groups.size
    context_map = ContextTransportMap(values, tuple(maps), coef, intercept, priors)
    return ContextFit(context_map, values[np.asarray(fallback, dtype=np.intp)])
