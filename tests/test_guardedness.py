"""After erasure, a scikit-learn logistic probe does no better than the majority baseline."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from sklearn.dummy import DummyClassifier
from sklearn.exceptions import ConvergenceWarning
from sklearn.feature_selection import VarianceThreshold
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import StratifiedKFold, cross_val_score
from sklearn.pipeline import Pipeline, make_pipeline
from sklearn.preprocessing import StandardScaler

from veil import INLP, LEACE, RLACE, MeanProjection
from veil.erasers import LinearErasure

from .conftest import Split, planted

# INLP stops on its own held-out accuracy; on the small bundled sets that
# part is a few dozen rows, so it waits for three classifiers in a row at
# the majority rather than trusting one.
INLP_PARAMS = {"max_iter": 150, "patience": 3, "validation_fraction": 0.3, "random_state": 0}
ERASERS = {
    "leace": lambda: LEACE(),
    "meanproj": lambda: MeanProjection(),
    "inlp-logistic": lambda: INLP(**INLP_PARAMS),
    "inlp-moments": lambda: INLP(classifier="moments", **INLP_PARAMS),
}
PUBLISHED = {
    "inlp-logistic-published": lambda: INLP(close_with_mean_projection=False, **INLP_PARAMS),
    "inlp-moments-published": lambda: INLP(classifier="moments", close_with_mean_projection=False, **INLP_PARAMS),
}
DATASETS = ("breast_cancer", "wine", "planted_split", "profiles")


def probe(x_reference: np.ndarray) -> Pipeline:
    """scikit-learn's standardised logistic regression: the probe every check here trusts.

    Standardising matters: an unscaled probe with the default C is heavily
    regularised on embeddings (feature spread ~0.05) and under-reports
    leakage.  Coordinates with almost no variance are dropped first
    (VarianceThreshold): MiniLM has three, at ~1e-33, which no dot product
    downstream can see but which a standard scaler would blow up.
    """
    floor = 1e-12 * float(np.mean(np.var(x_reference, axis=0)))
    return make_pipeline(VarianceThreshold(floor), StandardScaler(), LogisticRegression(max_iter=5000))


def _majority(z: np.ndarray) -> float:
    _, counts = np.unique(z, return_counts=True)
    return float(counts.max() / counts.sum())


def _fit(name: str, split: Split) -> LinearErasure:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        return {**ERASERS, **PUBLISHED}[name]().fit(split.x_fit, split.z_fit)


def _probe_gap(eraser_name: str, split: Split) -> float:
    """|accuracy - majority| on the held-out split of a probe trained on the erased fitting split."""
    eraser = _fit(eraser_name, split)
    # Reference: scikit-learn's LogisticRegression, trained on the erased
    # fitting split and scored on the held-out split.
    erased_fit = eraser.transform(split.x_fit)
    model: Pipeline | DummyClassifier = probe(split.x_fit)
    if eraser.rank_ == split.x_fit.shape[1]:
        # Every direction was removed: nothing is left to probe but the class prior.
        model = DummyClassifier(strategy="most_frequent")
    accuracy = model.fit(erased_fit, split.z_fit).score(eraser.transform(split.x_held), split.z_held)
    raw = probe(split.x_fit).fit(split.x_fit, split.z_fit).score(split.x_held, split.z_held)
    majority = _majority(split.z_held)
    assert raw > majority + 0.15, "the data must carry the attribute for the test to mean anything"
    return abs(accuracy - majority)


CASES = [(eraser, dataset) for eraser in sorted(ERASERS) for dataset in DATASETS]
# The published INLP procedure (no closing mean-projection step) misses the
# 0.03 target on two sets: the 384-d real sample (0.09 above majority) and
# wine (0.034: one row of 89 over).  Its figures are pinned below.
PUBLISHED_INLP_SHORT = {"profiles": 0.12, "wine": 0.06}


@pytest.mark.parametrize(("eraser_name", "dataset"), CASES)
def test_probe_trained_on_erased_fit_split_is_at_majority_on_the_other_split(
    dataset: str, eraser_name: str, request: pytest.FixtureRequest
) -> None:
    assert _probe_gap(eraser_name, request.getfixturevalue(dataset)) <= 0.03


@pytest.mark.parametrize("dataset", sorted(PUBLISHED_INLP_SHORT))
@pytest.mark.parametrize("eraser_name", ["inlp-logistic-published", "inlp-moments-published"])
def test_published_inlp_where_it_misses_the_target_removes_most_linear_signal(
    eraser_name: str, dataset: str, request: pytest.FixtureRequest
) -> None:
    # Why INLP closes with a mean-projection step by default: without it the
    # stopping rule leaves this much behind.  Pinned so it can only improve.
    assert _probe_gap(eraser_name, request.getfixturevalue(dataset)) <= PUBLISHED_INLP_SHORT[dataset]


@pytest.mark.parametrize("eraser_name", sorted(ERASERS))
def test_probe_trained_only_on_held_out_rows_is_at_majority_on_planted_data(eraser_name: str) -> None:
    # The stricter protocol: the probe never sees a row the eraser was fitted
    # on.  It needs many rows per dimension (here 1,500 per dimension).

    x, z = planted(n=48000, d=16, seed=1)
    eraser = _fit(eraser_name, Split("planted", x[:24000], z[:24000], x[24000:], z[24000:]))
    folds = StratifiedKFold(5, shuffle=True, random_state=0)
    accuracy = cross_val_score(probe(x[:24000]), eraser.transform(x[24000:]), z[24000:], cv=folds)
    assert abs(accuracy.mean() - _majority(z[24000:])) <= 0.03


def test_held_out_probe_on_real_embeddings_is_far_below_raw_leakage(profiles: Split) -> None:
    # On 2,100 fitting rows of 384-d embeddings the eraser's estimate is
    # noisy, and a probe trained on held-out rows finds part of the residue
    # (measured here: 0.075 above majority).  This pins the size of that
    # residue against the raw leakage of about 0.49.
    folds = StratifiedKFold(5, shuffle=True, random_state=0)
    majority = _majority(profiles.z_held)
    raw = cross_val_score(probe(profiles.x_fit), profiles.x_held, profiles.z_held, cv=folds).mean()
    erased = LEACE().fit(profiles.x_fit, profiles.z_fit).transform(profiles.x_held)
    after = cross_val_score(probe(profiles.x_fit), erased, profiles.z_held, cv=folds).mean()
    assert raw - majority > 0.45
    assert abs(after - majority) < 0.1


def _held_out_probe_after(eraser: LinearErasure, split: Split) -> float:
    """Accuracy of a probe trained and scored only on held-out rows (5-fold CV), after erasure."""
    erased = eraser.fit(split.x_fit, split.z_fit).transform(split.x_held)
    folds = StratifiedKFold(5, shuffle=True, random_state=0)
    return float(cross_val_score(probe(split.x_fit), erased, split.z_held, cv=folds).mean())


def test_rlace_of_rank_one_on_real_embeddings_leaves_what_mean_projection_leaves(profiles: Split) -> None:
    # On a binary attribute the game's optimum at rank 1 makes the class
    # means coincide (linear guardedness <=> equal class-conditional means,
    # the theorem of the LEACE paper), i.e. it removes the class-mean
    # difference: what mean projection removes.  So a probe trained on
    # held-out rows (scikit-learn) should find the same residue after both.
    # Measured on this split: 0.589 after both (majority 0.509, 0.998 before
    # erasure); R-LACE left 0.821 before the fix.
    after_rlace = _held_out_probe_after(RLACE(rank=1, random_state=0), profiles)
    after_mean_projection = _held_out_probe_after(MeanProjection(), profiles)
    assert abs(after_rlace - after_mean_projection) <= 0.02


@pytest.mark.parametrize("eraser_name", ["leace", "meanproj", "inlp-moments", "rlace"])
def test_dead_coordinates_of_real_embeddings_hold_the_fitting_mean(eraser_name: str, profiles: Split) -> None:
    make = {**ERASERS, "rlace": lambda: RLACE(random_state=0)}[eraser_name]
    # all-MiniLM-L6-v2 leaves three coordinates with values near 1e-33 and 1e-8 (numpy's variance: at most
    # 1e-10 of the largest).  Passed through, their rounding-level values carry the attribute, which a model that
    # standardises its features reads back; every map writes the fitting mean there instead.
    eraser = make().fit(profiles.x_fit, profiles.z_fit)
    x_fit = profiles.x_fit.astype(np.float64)
    variances = x_fit.var(axis=0)
    dead = np.flatnonzero(variances <= 1e-10 * variances.max())
    assert dead.size == 3
    np.testing.assert_array_equal(eraser.pins_.coordinates, dead)
    erased = eraser.transform(profiles.x_held)
    assert np.ptp(erased[:, dead], axis=0).max() == 0
    # The fitting mean (numpy's mean as reference), rounded once to the rows' dtype.
    np.testing.assert_allclose(erased[0, dead], x_fit[:, dead].mean(axis=0), rtol=np.finfo(erased.dtype).eps, atol=0)
