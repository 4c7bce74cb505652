"""The fitting methods by key, their options as the command line gives them, and a fit whose warnings become notes."""

from __future__ import annotations

import json
import warnings
from collections.abc import Callable, Sequence
from typing import Any

from veil.erasers import INLP, LEACE, RLACE, Erasure, MeanProjection
from veil.erasers.transport import GaussianTransport
from veil.errors import DataError
from veil.fitting.request import MethodSpec

METHODS: dict[str, type[Erasure]] = {
    "leace": LEACE,
    "meanproj": MeanProjection,
    "inlp": INLP,
    "rlace": RLACE,
    "transport": GaussianTransport,
}


#: Estimator parameters the request sets itself (:class:`MethodSpec`'s own fields), not method options.
_SET_BY_REQUEST = ("normalize", "random_state", "guard_population")


def method_parameters(method: str) -> dict[str, Any]:
    """The parameters ``method`` accepts, with their defaults (those the request sets itself excluded)."""
    if method not in METHODS:
        raise DataError(f"unknown method {method!r}; choose one of {', '.join(METHODS)}")
    defaults = METHODS[method]().get_params()
    return {key: value for key, value in defaults.items() if key not in _SET_BY_REQUEST}


def _convert(method: str, key: str, text: str, default: Any) -> Any:
    """``text`` as the type of the parameter's default (a JSON literal where the default is None).

    Where the default is a word, a number is taken as a number: a parameter may take a named rule or a value
    (transport's ``shrinkage=ledoit-wolf`` or ``shrinkage=0.3``), and the estimator checks which it accepts.
    """
    try:
        if isinstance(default, bool):
            if text.lower() not in ("true", "false"):
                raise ValueError(text)
            return text.lower() == "true"
        if isinstance(default, int):
            return int(text)
        if isinstance(default, float):
            return float(text)
        if isinstance(default, str):
            try:
                return float(text)
            except ValueError:
                return text
        return json.loads(text)
    except ValueError:
        kind = type(default).__name__ if default is not None else "JSON value"
        raise DataError(f"{method} parameter {key}={text!r} is not a valid {kind}") from None


def parse_parameters(method: str, assignments: Sequence[str]) -> dict[str, Any]:
    """``["max_iter=30", "classifier=moments"]`` as typed keyword arguments of ``method``'s eraser.

    Raises
    ------
    DataError
        An assignment without ``=``, or a parameter the method does not have
        (the message lists those it has).
    """
    known = method_parameters(method)
    parsed: dict[str, Any] = {}
    for assignment in assignments:
        key, separator, text = assignment.partition("=")
        key = key.strip().replace("-", "_")
        if not separator or not key:
            raise DataError(f"method options are KEY=VALUE, got {assignment!r}")
        if key not in known:
            raise DataError(f"{method} has no option {key!r}; its options are {', '.join(sorted(known))}")
        parsed[key] = _convert(method, key, text.strip(), known[key])
    return parsed


def make_eraser(spec: MethodSpec, **overrides: Any) -> Erasure:
    """The estimator ``spec`` describes, with ``overrides`` of its options (a sweep's strength)."""
    options = {**spec.params, **overrides}
    unknown = sorted(set(options) - set(method_parameters(spec.method)))
    if unknown:
        raise DataError(f"{spec.method} has no option {unknown[0]!r}")
    accepted = METHODS[spec.method]().get_params()
    if "random_state" in accepted:
        options["random_state"] = spec.seed
    if "guard_population" in accepted:
        options["guard_population"] = spec.guard_population
    return METHODS[spec.method](**options, normalize=spec.normalize)


def fit_collecting_notes(eraser: Erasure, method: str, fit: Callable[[], object]) -> list[str]:
    """Run ``fit``; bad data becomes a :class:`DataError`, and warnings become notes for the card."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            fit()
        except ValueError as error:
            raise DataError(f"{method} cannot fit this sample: {error}") from None
    return sorted({str(w.message) for w in caught if issubclass(w.category, UserWarning)})
