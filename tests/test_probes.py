"""The audit's probes: each reads a planted signal that others miss; per-class figures match scikit-learn."""

from __future__ import annotations

import numpy as np
import pytest
from numpy.typing import NDArray
from sklearn.datasets import load_wine
from sklearn.ensemble import HistGradientBoostingClassifier
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import balanced_accuracy_score, recall_score
from sklearn.model_selection import StratifiedKFold, train_test_split
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from veil import LEACE
from veil.audit import ProbeScore, audit, probes, readers
from veil.audit.report import PROBES, Leakage
from veil.samples.harbourline import load_harbourline_profiles

IntArray = NDArray[np.intp]


def _scores(x: NDArray[np.float64], z: IntArray, names: tuple[str, ...] = PROBES) -> dict[str, ProbeScore]:
    sizes = readers.fold_sizes(z, 5)
    return {
        name: probes.classification_score(
            readers.build_probe(name, 0, sizes=sizes, features=x.shape[1]), x, z, folds=5, random_state=0
        )
        for name in names
    }


def _misses(score: ProbeScore) -> bool:
    """The probe's 95% interval reaches down to the majority baseline: it reads nothing it can show."""
    return score.interval_low <= score.majority


def _reads(score: ProbeScore) -> bool:
    return score.interval_low > score.majority


def test_a_quadratic_only_signal_is_read_by_the_quadratic_and_kernel_probes_not_the_linear_one() -> None:
    rng = np.random.default_rng(0)
    x = rng.normal(size=(3000, 8))
    # z = [xᵀ A x > 0] with A's eigenvalues spread over [-1, 1] in a random basis.  x → -x keeps z, so both
    # classes have mean zero; by LEACE's theorem (equal class-conditional means) no linear classifier does
    # better than a constant, while z is a linear function of the pairwise products.
    basis = np.linalg.qr(rng.normal(size=(8, 8)))[0]
    quadratic_form = basis @ np.diag(np.linspace(-1, 1, 8)) @ basis.T
    z = (np.einsum("ij,jk,ik->i", x, quadratic_form, x) > 0).astype(np.intp)
    scores = _scores(x, z, ("linear", "quadratic", "kernel"))
    assert _misses(scores["linear"])
    assert scores["quadratic"].accuracy > 0.95
    assert scores["kernel"].accuracy > 0.9


def test_a_signal_in_a_tenth_of_the_rows_is_read_by_the_trees_and_kernel_probes_not_the_linear_one() -> None:
    rng = np.random.default_rng(0)
    x = rng.normal(size=(6000, 6))
    z = rng.integers(0, 2, 6000)
    # A sub-population of 10% sits apart along x0; only there z is set, by |x1| above its median (0.6745 is
    # the standard normal's 75th percentile), so its class means coincide.  Elsewhere z is a coin flip:
    # the best any reader can do is 0.5 + 0.1 · 0.5 = 0.55 (worked by hand).
    group = np.arange(6000) < 600
    x[group, 0] += 5
    z[group] = np.abs(x[group, 1]) > 0.6745
    scores = _scores(x, z.astype(np.intp), ("linear", "kernel", "trees"))
    assert _misses(scores["linear"])
    assert _reads(scores["trees"])
    assert _reads(scores["kernel"])
    assert scores["trees"].accuracy < 0.55 + 0.02  # no more than the sub-population holds


def test_a_signal_with_equal_class_means_and_covariances_is_read_by_the_trees_and_kernel_probes_only() -> None:
    rng = np.random.default_rng(0)
    x = rng.normal(size=(3000, 8))
    z = rng.integers(0, 2, 3000)
    sign = 2 * z - 1
    # Where |x0| > 1.6449 (10% of rows: the standard normal's two 5% tails) x1 moves by 3 towards the class;
    # everywhere else by 1/3 away from it.  Each class then has the same mean and covariance (worked by hand:
    # 0.1 · 3 = 0.9 · 1/3, the squares of the moves do not depend on the class, and x0 is symmetric), so by
    # LEACE's theorem applied to the degree-2 features no quadratic classifier does better than a constant.
    tails = np.abs(x[:, 0]) > 1.6449
    x[:, 1] += np.where(tails, 3.0, -1 / 3) * sign
    scores = _scores(x, z.astype(np.intp), ("linear", "quadratic", "kernel", "trees"))
    assert _misses(scores["linear"])
    assert _misses(scores["quadratic"])
    assert scores["trees"].accuracy > 0.58
    assert scores["kernel"].accuracy > 0.58


def test_per_class_recall_and_balanced_accuracy_match_scikit_learn() -> None:
    # Reference: sklearn.metrics.recall_score(average=None) and balanced_accuracy_score on the same predictions,
    # for hand-made predictions (one class never predicted) and for a probe's held-out predictions on the
    # bundled wine set (three classes of unequal size).
    codes = np.array([0, 0, 0, 0, 1, 1, 1, 2, 2, 2, 2, 2])
    predicted = np.array([0, 0, 1, 1, 1, 1, 0, 0, 0, 1, 1, 0])
    x, y = load_wine(return_X_y=True)
    y = y.astype(np.intp)
    folds = StratifiedKFold(5, shuffle=True, random_state=0)
    held = probes.held_out_predictions(probes.linear_probe(0), x[:, :2], y, folds)
    for truth, guess in ((codes, predicted), (y, held)):
        score = probes.score_predictions(truth, guess)
        assert score.recall == pytest.approx(recall_score(truth, guess, average=None))
        assert score.balanced_accuracy == pytest.approx(balanced_accuracy_score(truth, guess))
        assert score.accuracy == pytest.approx(np.mean(truth == guess))
    assert 0.5 < probes.score_predictions(y, held).balanced_accuracy < 0.95  # two features: a real, imperfect probe


def _score(hits: int, n: int = 1000) -> ProbeScore:
    return ProbeScore(accuracy=hits / n, balanced_accuracy=0.5, majority=0.5, interval_low=0, interval_high=1, n=n)


def test_the_strongest_probe_has_the_most_rows_right_after_erasure_and_ties_go_to_the_first_listed() -> None:
    plain = _score(500)

    def leakage(**after: ProbeScore) -> Leakage:
        # Each named probe scores the same before and after; the linear probe reads nothing unless named.
        fields: dict[str, ProbeScore | None] = {"linear_before": plain, "linear_after": plain}
        fields |= {"nonlinear_before": None, "nonlinear_after": None}
        for name, score in after.items():
            fields[f"{name}_before"] = fields[f"{name}_after"] = score
        return Leakage(guardedness_gap_before=None, guardedness_gap_after=None, **fields)

    assert leakage().strongest == "linear"
    assert leakage(trees=_score(701), nonlinear=_score(700)).strongest == "trees"
    assert leakage(kernel=_score(700), nonlinear=_score(700), quadratic=_score(699)).strongest == "kernel"
    # 0.7 and 0.1 · 7 differ in the last bit as floats; the counts (700 of 1000) are the same, so the order
    # of the table decides, not round-off.
    assert 7 * 0.1 != 0.7
    assert leakage(quadratic=_score(700), trees=ProbeScore(7 * 0.1, 0.5, 0.5, 0, 1, 1000)).strongest == "quadratic"


def test_the_probes_read_rounding_level_copies_in_dead_coordinates_as_a_standardising_model_does() -> None:
    # The committed sample (all-MiniLM-L6-v2) has coordinates with almost no spread.  A copy of the attribute
    # written into them at 1e-12 of the typical spread is something a tree splits on and a model that standardises
    # its features reads, although no dot product sees it: the audit's probes must see it too (veil's maps pin
    # those coordinates instead, see test_pins).
    sample = load_harbourline_profiles()
    held = train_test_split(np.arange(sample.pronoun.size), test_size=0.5, random_state=0, stratify=sample.pronoun)[1]
    raw = sample.embedding[held].astype(np.float64)
    codes = np.unique(sample.pronoun[held], return_inverse=True)[1].astype(np.intp)
    dead = np.isin(np.arange(raw.shape[1]), probes.dead_features(raw))
    assert 1 <= dead.sum() <= 5
    # Every live coordinate replaced by noise, and the copy written into the dead ones: whatever a probe reads
    # now, it reads from the dead coordinates.
    noise = np.random.default_rng(0).normal(scale=0.05, size=raw.shape)
    x = np.where(dead, 1e-14 * codes[:, None], noise)
    folds = StratifiedKFold(5, shuffle=True, random_state=0)
    # Reference: scikit-learn's boosted trees, and its standard scaler with logistic regression, read the copy.
    for reference in (
        HistGradientBoostingClassifier(random_state=0),
        make_pipeline(StandardScaler(), LogisticRegression()),
    ):
        assert np.mean(probes.held_out_predictions(reference, x, codes, folds) == codes) > 0.9
    scores = _scores(x, codes, ("linear", "trees"))
    assert _reads(scores["linear"])
    assert _reads(scores["trees"])


def test_a_dozen_held_out_rows_are_enough_for_every_probe() -> None:
    # Four rows per class: stratified folds of 3 training rows per class leave no room for a validation split,
    # so the trees and the MLP run without early stopping instead of failing.
    rng = np.random.default_rng(0)
    z = np.arange(300) % 3
    eraser = LEACE().fit(rng.normal(size=(300, 10)) + z[:, None], z)
    held = np.arange(12) % 3
    report = audit(eraser, rng.normal(size=(12, 10)) + held[:, None], held)
    assert report.protocol is not None
    assert report.protocol.folds == 4
    assert [name for name, _, _ in report.leakage.probes()] == list(PROBES)
    assert all(after.n == 12 for _, _, after in report.leakage.probes())
