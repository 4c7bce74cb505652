"""scikit-learn's own estimator checks (sklearn.utils.estimator_checks.parametrize_with_checks)."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import pytest
from sklearn.utils.estimator_checks import parametrize_with_checks

from veil import INLP, LEACE, RLACE, MeanProjection

# Checks that do not apply to an eraser supervised by an attribute, each with why.
NOT_APPLICABLE = {
    # The attribute argument is named z, not y, on purpose (it is what gets
    # erased, not a target to predict).  A pipeline's y is its task, so there
    # the attribute goes by keyword, routed (tests/test_pipeline_routing.py).
    "check_fit_score_takes_y": "the attribute argument is named z",
    # R-LACE removes rank < d directions; with one feature no rank is possible.
    "check_fit2d_1feature": "R-LACE needs rank < d; with one feature no rank is possible",
}


def _skip_reason(estimator: Any, check: Callable[..., Any]) -> str | None:
    name = getattr(check, "func", check).__name__
    if name == "check_fit_score_takes_y":
        return NOT_APPLICABLE[name]
    if name == "check_fit2d_1feature" and isinstance(estimator, RLACE):
        return NOT_APPLICABLE[name]
    return None


@parametrize_with_checks(
    [
        LEACE(),
        LEACE(covariance_directions=2),
        MeanProjection(),
        INLP(max_iter=3, random_state=0),
        INLP(classifier="moments", max_iter=3, random_state=0),
        RLACE(rank=1, max_iter=5, random_state=0),
    ]
)
def test_scikit_learn_estimator_checks(estimator: Any, check: Callable[..., Any]) -> None:
    reason = _skip_reason(estimator, check)
    if reason is not None:
        pytest.skip(reason)
    check(estimator)
