"""An eraser inside a scikit-learn pipeline: the attribute arrives by metadata routing, the pipeline's y is the task.

A pipeline hands its ``y`` (the task) to every step's ``fit`` as the second argument.  The erasers take the
attribute by keyword, ``attribute=``, requested with ``set_fit_request`` (scikit-learn's metadata routing); the
pipeline must then keep the task and erase the attribute, exactly as the same steps run by hand.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pytest
import sklearn
from numpy.typing import NDArray
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import KFold, cross_validate
from sklearn.pipeline import Pipeline, make_pipeline

from veil import INLP, LEACE, RLACE, MeanProjection
from veil.erasers.transport import GaussianTransport
from veil.samples.harbourline import load_harbourline_profiles

from .tolerances import apply_bound, assert_same_answer

# The committed Harbourline sample (veil.samples.harbourline): the attribute is the pronoun, the task the field
# of work, and the age bracket serves as a context column for ``given=``.
PROFILES = load_harbourline_profiles()
X, PRONOUN, FIELD, AGE = PROFILES.embedding, PROFILES.pronoun, PROFILES.field, PROFILES.age_bracket
FOLDS = KFold(n_splits=3, shuffle=True, random_state=0)


def _classifier() -> LogisticRegression:
    return LogisticRegression(max_iter=2000)


def _majority_share(labels: NDArray[np.generic]) -> float:
    return float(np.unique(labels, return_counts=True)[1].max() / labels.size)


def _three_standard_errors(share: float, n: int) -> float:
    # A held-out accuracy's binomial standard error; three of them as the margin of chance (common practice).
    return 3.0 * float(np.sqrt(share * (1.0 - share) / n))


def _assert_reads_at_most_majority(
    out: NDArray[np.floating], labels: NDArray[np.generic], train: NDArray[np.intp], test: NDArray[np.intp], what: str
) -> None:
    probe = _classifier().fit(out[train], labels[train])
    accuracy = float(probe.score(out[test], labels[test]))
    majority = _majority_share(labels[test])
    assert accuracy <= majority + _three_standard_errors(majority, test.size), (what, accuracy, majority)


@pytest.mark.parametrize("with_given", [False, True], ids=["attribute", "attribute-and-given"])
def test_a_routed_pipeline_keeps_the_task_and_erases_the_attribute_as_the_steps_run_by_hand(
    with_given: bool,
) -> None:
    params: dict[str, Any] = {"attribute": PRONOUN} | ({"given": AGE} if with_given else {})
    with sklearn.config_context(enable_metadata_routing=True):
        pipeline = make_pipeline(LEACE().set_fit_request(attribute=True, given=with_given), _classifier())
        routed = cross_validate(pipeline, X, FIELD, cv=FOLDS, params=params, return_estimator=True)

    for fold, ((train, test), fitted) in enumerate(zip(FOLDS.split(X), routed["estimator"], strict=True)):
        # The same steps by hand (sklearn's KFold folds): the eraser fitted on the training fold with the
        # attribute, a logistic regression of the task on its output.
        eraser = LEACE().fit(X[train], PRONOUN[train], given=AGE[train] if with_given else None)
        reader = _classifier().fit(eraser.transform(X[train]), FIELD[train])
        by_hand = float(reader.score(eraser.transform(X[test]), FIELD[test]))

        # The pipeline's eraser is the one fitted by hand, to float32 round-off (tests/tolerances.py).
        assert_same_answer(
            fitted[0].transform(X[test]), eraser.transform(X[test]), apply_bound(eraser.export(), X[test]), f"{fold}"
        )
        # One test row whose decision value sits within round-off of a tie may go either way.
        assert abs(routed["test_score"][fold] - by_hand) <= 1.0 / test.size
        # The task is kept: far above its majority share (by hand, so the pipeline is not its own reference).
        majority = _majority_share(FIELD[test])
        assert by_hand > majority + _three_standard_errors(majority, test.size), (fold, by_hand, majority)

    # The attribute is erased from what the pipeline's first step hands on: a held-out probe of the fold reads it
    # no better than its majority share, where it read the raw rows well.
    train, test = next(FOLDS.split(X))
    erased = routed["estimator"][0][:-1].transform(X)
    raw_accuracy = float(_classifier().fit(X[train], PRONOUN[train]).score(X[test], PRONOUN[test]))
    raw_majority = _majority_share(PRONOUN[test])
    assert raw_accuracy > raw_majority + _three_standard_errors(raw_majority, test.size)
    _assert_reads_at_most_majority(erased, PRONOUN, train, test, "population")
    if with_given:
        # Within every age bracket too: the context went along with the attribute.
        for value in np.unique(AGE):
            _assert_reads_at_most_majority(
                erased, PRONOUN, train[AGE[train] == value], test[AGE[test] == value], f"within {value}"
            )


def _first_rows(n: int) -> tuple[NDArray[np.float32], NDArray[np.str_], NDArray[np.str_]]:
    # The first 32 coordinates are enough to tell which argument was erased, and keep the iterative erasers quick.
    return X[:n, :32], PRONOUN[:n], FIELD[:n]


@pytest.mark.parametrize(
    "eraser",
    [
        LEACE(),
        MeanProjection(),
        INLP(max_iter=2, random_state=0),
        INLP(classifier="moments", max_iter=2, random_state=0),
        RLACE(rank=1, max_iter=3, random_state=0),
        GaussianTransport(random_state=0),
    ],
    ids=repr,
)
# Two INLP rounds do not reach chance on these rows; the check compares fits, not their convergence.
@pytest.mark.filterwarnings("ignore::sklearn.exceptions.ConvergenceWarning")
def test_the_attribute_by_keyword_wins_over_the_second_argument(eraser: Any) -> None:
    x, z, task = _first_rows(600)
    reference = sklearn.clone(eraser).fit(x, z)
    direct = reference.transform(x)
    # Each answer is the direct fit's to float32 round-off of applying its map (tests/tolerances.py).
    bound = apply_bound(reference.export(), x)
    # The task in the second argument, as a pipeline passes it: not read when the attribute comes by keyword.
    assert_same_answer(sklearn.clone(eraser).fit(x, task, attribute=z).transform(x), direct, bound, "keyword")
    assert_same_answer(sklearn.clone(eraser).fit(x, attribute=z).transform(x), direct, bound, "keyword alone")
    # TransformerMixin.fit_transform passes its keywords to fit.
    assert_same_answer(sklearn.clone(eraser).fit_transform(x, task, attribute=z), direct, bound, "fit_transform")
    # Were the task erased instead, it would show: fitted on the task, the answer is another.
    with pytest.raises(AssertionError, match="differ by more than round-off"):
        assert_same_answer(sklearn.clone(eraser).fit(x, task).transform(x), direct, bound, "the task")


@pytest.mark.parametrize(
    "eraser", [LEACE(), MeanProjection(), INLP(classifier="moments", max_iter=2, random_state=0)], ids=repr
)
@pytest.mark.filterwarnings("ignore::sklearn.exceptions.ConvergenceWarning")
def test_partial_fit_takes_the_attribute_by_keyword_too(eraser: Any) -> None:
    x, z, task = _first_rows(600)
    whole = sklearn.clone(eraser).fit(x, z).transform(x)
    chunked = sklearn.clone(eraser)
    for rows in np.array_split(np.arange(x.shape[0]), 3):
        chunked.partial_fit(x[rows], task[rows], attribute=z[rows])
    # Merged moments sum in another order than one pass: float32 round-off of the map (tests/tolerances.py).
    assert_same_answer(chunked.transform(x), whole, apply_bound(chunked.export(), x))


def test_given_goes_by_keyword_alongside_the_attribute() -> None:
    x, z, task = _first_rows(900)
    given = AGE[:900]
    reference = LEACE().fit(x, z, given=given)
    keyword = LEACE().fit(x, task, attribute=z, given=given).transform(x)
    assert_same_answer(keyword, reference.transform(x), apply_bound(reference.export(), x), "given")


def test_the_second_argument_is_not_routable_metadata() -> None:
    # A routed z would collide with the pipeline's positional y; attribute and given are what a pipeline routes.
    for eraser in (LEACE(), MeanProjection(), GaussianTransport()):
        routing = eraser.get_metadata_routing()
        assert set(routing.fit.requests) == {"attribute", "given"}
    for eraser in (INLP(), RLACE()):
        assert set(eraser.get_metadata_routing().fit.requests) == {"attribute"}
    assert set(LEACE().get_metadata_routing().partial_fit.requests) == {"attribute", "given"}
    assert set(INLP(classifier="moments").get_metadata_routing().partial_fit.requests) == {"attribute"}


@pytest.mark.parametrize(
    ("eraser", "method"),
    [(LEACE(), "fit"), (GaussianTransport(), "fit"), (INLP(classifier="moments"), "partial_fit")],
    ids=repr,
)
def test_an_eraser_that_requested_the_attribute_refuses_to_fit_without_it(eraser: Any, method: str) -> None:
    x, z, task = _first_rows(300)
    with sklearn.config_context(enable_metadata_routing=True):
        getattr(eraser, f"set_{method}_request")(attribute=True)
        # Routing on and the attribute forgotten: the pipeline would hand over only its task.
        pipeline = make_pipeline(sklearn.clone(eraser), _classifier())
        with pytest.raises(ValueError, match="requests the attribute by routing"):
            getattr(pipeline[0], method)(x, task)
        if method == "fit":
            with pytest.raises(ValueError, match="requests the attribute by routing"):
                pipeline.fit(x, task)
        # Under an alias, the message names the key to pass.
        getattr(eraser, f"set_{method}_request")(attribute="pronoun")
        with pytest.raises(ValueError, match="'pronoun'"):
            getattr(eraser, method)(x, task)
        getattr(eraser, method)(x, task, attribute=z)
    # Routing off, the request is not consulted: direct use reads z.
    getattr(sklearn.clone(eraser), method)(x, z)


def test_without_routing_a_step_parameter_carries_the_attribute() -> None:
    x, z, task = _first_rows(900)
    pipeline: Pipeline = make_pipeline(LEACE())
    # Routing off (scikit-learn's default): Pipeline.fit hands ``leace__attribute`` to the step named leace.
    pipeline.fit(x, task, leace__attribute=z)
    reference = LEACE().fit(x, z)
    assert_same_answer(pipeline.transform(x), reference.transform(x), apply_bound(reference.export(), x), "step")
