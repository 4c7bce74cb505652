"""Bad input raises ValueError with a message that names the problem."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.exceptions import NotFittedError

from veil import INLP, LEACE, RLACE, MeanProjection
from veil.erasers import LinearErasure

from .conftest import planted

ALL = [LEACE, MeanProjection, INLP, RLACE]


def _good() -> tuple[np.ndarray, np.ndarray]:
    return planted(n=200, d=5, seed=0)


@pytest.mark.parametrize("factory", ALL)
@pytest.mark.parametrize(
    ("mutate", "message"),
    [
        (lambda x, z: (np.where(np.arange(x.size).reshape(x.shape) == 3, np.nan, x), z), "NaN"),
        (lambda x, z: (np.where(np.arange(x.size).reshape(x.shape) == 3, np.inf, x), z), "infinity"),
        (lambda x, z: (x[:, 0], z), "Expected 2D array"),
        (lambda x, z: (x, z[:-1]), "X has 200 rows but z has 199"),
        (lambda x, z: (x, np.zeros_like(z)), "only one class"),
        (lambda x, z: (x[:2], np.array([0, 1])), "need more rows than classes"),
        (lambda x, z: (x, None), "needs the attribute z"),
        (lambda x, z: (x, np.where(np.arange(200) == 0, np.nan, z.astype(float))), "labels contain NaN"),
    ],
)
def test_bad_fitting_input_is_refused_clearly(factory: type[LinearErasure], mutate, message: str) -> None:  # type: ignore[no-untyped-def]
    x, z = _good()
    bad_x, bad_z = mutate(x, z)
    with pytest.raises(ValueError, match=message):
        factory().fit(bad_x, bad_z)


@pytest.mark.parametrize("factory", ALL)
def test_wrong_feature_count_at_transform_is_refused(factory: type[LinearErasure]) -> None:
    x, z = _good()
    eraser = factory().fit(x, z) if factory is not RLACE else RLACE(max_iter=5).fit(x, z)
    with pytest.raises(ValueError, match=r"X has 4 features, but .* is expecting 5 features"):
        eraser.transform(x[:, :4])


@pytest.mark.parametrize("factory", ALL)
def test_transform_before_fit_is_refused(factory: type[LinearErasure]) -> None:
    with pytest.raises(NotFittedError):
        factory().transform(np.zeros((2, 3)))


def test_rank_larger_than_possible_is_refused() -> None:
    x, z = _good()
    with pytest.raises(ValueError, match="rank 5 is too large: it must be below the dimension 5"):
        RLACE(rank=5).fit(x, z)
    with pytest.raises(ValueError, match="rank must be a positive integer"):
        RLACE(rank=0).fit(x, z)


@pytest.mark.parametrize(("name", "value"), [("alpha", 0.0), ("alpha", -1.0), ("projection_learning_rate", np.nan)])
def test_rlace_refuses_a_step_or_penalty_that_is_not_positive(name: str, value: float) -> None:
    x, z = _good()
    with pytest.raises(ValueError, match=f"{name} must be a positive number"):
        RLACE(**{name: value}).fit(x, z)


def test_classifier_erasers_refuse_a_numeric_attribute_matrix() -> None:
    x, z = _good()
    with pytest.raises(ValueError, match="needs 1-D class labels"):
        INLP().fit(x, np.column_stack([z, 1 - z]).astype(float))


def test_mixed_label_types_are_refused() -> None:
    x, _ = _good()
    labels = np.array(["a", 1] * 100, dtype=object)
    with pytest.raises(ValueError, match="all strings or all integers"):
        LEACE().fit(x, labels)


def test_unknown_inlp_classifier_is_refused() -> None:
    x, z = _good()
    with pytest.raises(ValueError, match="classifier must be one of"):
        INLP(classifier="forest").fit(x, z)


def test_partial_fit_does_not_serve_until_two_classes_are_seen() -> None:
    x, z = _good()
    eraser = LEACE().partial_fit(x[z == 0], z[z == 0])
    with pytest.raises(NotFittedError):
        eraser.transform(x)
    eraser.partial_fit(x[z == 1], z[z == 1])
    assert eraser.transform(x).shape == x.shape
