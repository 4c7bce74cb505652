"""The audit's figures against independent references and hand-worked cases."""

from __future__ import annotations

import json
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from scipy import stats
from sklearn.base import BaseEstimator, ClassifierMixin
from sklearn.datasets import load_breast_cancer
from sklearn.exceptions import ConvergenceWarning
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import StratifiedKFold, cross_val_predict
from sklearn.neighbors import NearestNeighbors
from threadpoolctl import threadpool_info, threadpool_limits

from veil import LEACE
from veil.audit import AuditReport, ProbeScore, RegressionScore, audit, fit_and_audit, geometry, probes, readers
from veil.audit.report import HELD_OUT_KFOLD, PROBES
from veil.audit.stats import wilson_interval
from veil.fitting.job import fit_version
from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, ReadingSpec, StoreSpec
from veil.progress import reporting
from veil.registry import Registry
from veil.registry.card import format_card
from veil.samples.sources import LabelledSample
from veil.samples.splitting import give_every_class_both_parts, holdout_mask
from veil.samples.streaming import open_stream

from .conftest import planted


@pytest.mark.parametrize(("k", "n"), [(0, 10), (7, 10), (50, 100), (999, 1000), (1000, 1000)])
def test_wilson_interval_matches_scipy(k: int, n: int) -> None:
    # Reference: scipy.stats.binomtest(...).proportion_ci(method="wilson").
    expected = stats.binomtest(k, n).proportion_ci(confidence_level=0.95, method="wilson")
    low, high = wilson_interval(k, n)
    assert low == pytest.approx(expected.low, abs=1e-9)
    assert high == pytest.approx(expected.high, abs=1e-9)


def test_neighbours_match_scikit_learn_cosine_search() -> None:
    # Reference: sklearn.neighbors.NearestNeighbors with the cosine metric.
    x = np.random.default_rng(0).normal(size=(300, 12))
    ours = geometry.nearest_neighbours(x, 10)
    theirs = NearestNeighbors(n_neighbors=11, metric="cosine").fit(x).kneighbors(x, return_distance=False)[:, 1:]
    assert geometry.neighbour_overlap(ours, theirs) == pytest.approx(1.0)


def test_label_base_rate_is_the_share_of_same_label_pairs() -> None:
    codes = np.array([0, 0, 0, 1, 1])  # worked by hand: (3·2 + 2·1) / (5·4) = 0.4
    assert geometry.label_base_rate(codes) == pytest.approx(0.4)


def test_tpr_gap_worked_example() -> None:
    task = np.array([0, 0, 0, 0, 1, 1, 1, 1])
    group = np.array([0, 0, 1, 1, 0, 0, 1, 1])
    predicted = np.array([0, 0, 0, 1, 1, 0, 1, 1])
    # Task 0: TPR 1.0 in group 0, 0.5 in group 1; task 1: 0.5 vs 1.0 → RMS of (0.5, -0.5) = 0.5.
    assert geometry.tpr_gap_rms(task, predicted, group) == pytest.approx(0.5)


def test_relative_distortion_and_cosine_of_a_known_move() -> None:
    x = np.array([[1.0, 0.0], [-1.0, 0.0]])
    moved = np.array([[1.0, 1.0], [-1.0, 1.0]])
    assert geometry.relative_distortion(x, moved) == pytest.approx(1.0)  # moved by 1, spread 1
    assert geometry.mean_cosine(x, moved) == pytest.approx(np.sqrt(0.5))


def test_audit_probe_matches_a_plain_scikit_learn_cross_validation() -> None:
    x, z = planted(n=1500, d=10, seed=3)
    x = x + np.random.default_rng(3).normal(scale=2.0, size=x.shape)  # weaken the signal: accuracy below 1
    eraser = LEACE().fit(x[:750], z[:750])
    report = audit(eraser, x[750:], z[750:], nonlinear=False, random_state=0)
    before = report.leakage.linear_before
    assert isinstance(before, ProbeScore)
    # Reference: the same folds with scikit-learn's own cross_val_predict.
    folds = StratifiedKFold(5, shuffle=True, random_state=0)
    standardised = (x[750:] - x[750:].mean(0)) / x[750:].std(0)
    reference = cross_val_predict(LogisticRegression(max_iter=3000), standardised, z[750:], cv=folds)
    assert 0.6 < before.accuracy < 0.99
    assert before.accuracy == pytest.approx(np.mean(reference == z[750:]), abs=0.01)
    assert before.interval_low < before.accuracy < before.interval_high
    assert before.majority == pytest.approx(np.bincount(z[750:]).max() / 750)


def test_audit_of_planted_data_shows_leakage_removed_and_utility_kept() -> None:
    x, z = planted(n=8000, d=12, seed=4)
    task = (x[:, 0] + x[:, 1] > 0).astype(int)
    _, report = fit_and_audit(LEACE(), x, z, task=task, holdout=0.5, random_state=0)
    before, after = report.leakage.linear_before, report.leakage.linear_after
    assert isinstance(before, ProbeScore)
    assert isinstance(after, ProbeScore)
    assert before.gap > 0.2
    assert after.gap < 0.03
    assert report.leakage.guardedness_gap_after is not None
    assert report.leakage.guardedness_noise_floor is not None
    assert report.leakage.guardedness_gap_after < 3 * report.leakage.guardedness_noise_floor
    assert 0 < report.utility.relative_distortion < 0.5
    assert report.retrieval is not None
    assert report.retrieval.attribute_share_after < report.retrieval.attribute_share_before
    assert report.utility.task_accuracy_after is not None
    assert report.utility.task_accuracy_after > 0.8


def test_a_continuous_attribute_is_probed_with_ridge_r2() -> None:
    rng = np.random.default_rng(5)
    age = rng.uniform(20, 70, size=4000)
    x = rng.normal(size=(4000, 8)) + np.outer(age - 45, rng.normal(size=8)) * 0.05
    _, report = fit_and_audit(LEACE(), x, age[:, None], holdout=0.5, nonlinear=False)
    assert isinstance(report.leakage.linear_before, RegressionScore)
    assert isinstance(report.leakage.linear_after, RegressionScore)
    assert report.leakage.linear_before.r2 > 0.5
    assert report.leakage.linear_after.r2 < 0.01


def test_report_round_trips_through_json() -> None:
    x, z = planted(n=1200, d=6, seed=6)
    _, report = fit_and_audit(LEACE(), x, z, task=(x[:, 0] > 0).astype(int), nonlinear=True)
    text = report.to_json()
    assert AuditReport.from_json(text) == report
    stored = json.loads(text)
    assert stored["leakage"]["linear_after"]["n"] == report.n_heldout
    assert stored["leakage"]["strongest"] in PROBES
    assert [name for name, _, _ in report.leakage.probes()] == list(PROBES)
    assert "linear probe accuracy" in report.format_table()


#: The refits that measure the rows needed read the same held-out rows through maps of their own, which this test's
#: nearest-neighbour matching cannot place; tests/test_rows_needed.py checks what they fit on and read.
NO_REFITS = AuditSpec(rows_curve="never")


@pytest.mark.parametrize("streamed", [False, True])
def test_every_probe_is_trained_and_tested_on_held_out_rows_only_and_the_card_says_so(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, streamed: bool
) -> None:
    x, codes = planted(n=1500, d=6, seed=8)
    x = x.astype(np.float32)
    labels = np.array(["a", "b"])[codes]
    seen: list[np.ndarray] = []
    original = probes.held_out_predictions

    def recording(model: Any, rows: np.ndarray, *args: Any, **kwargs: Any) -> np.ndarray:
        seen.append(np.array(rows, dtype=np.float64))
        return original(model, rows, *args, **kwargs)

    monkeypatch.setattr(probes, "held_out_predictions", recording)
    registry = Registry(tmp_path / "r")
    held = holdout_mask(x.shape[0], fraction=0.2, seed=0)
    if streamed:
        np.save(tmp_path / "x.npy", x)
        np.save(tmp_path / "z.npy", labels)
        sample = open_stream(tmp_path / "x.npy", attribute="g", labels=tmp_path / "z.npy")
        outcome = fit_version(
            sample,
            FitRequest(MethodSpec("leace"), StoreSpec("held"), audit=NO_REFITS, reading=ReadingSpec(chunk_rows=400)),
            registry=registry,
        )
    else:
        held = give_every_class_both_parts(held, codes)
        sample = LabelledSample(embeddings=x, attribute=labels, attribute_key="g", task=None, task_key=None, files={})
        outcome = fit_version(
            sample, FitRequest(MethodSpec("leace"), StoreSpec("held"), audit=NO_REFITS), registry=registry
        )
    erased = registry.read_version("held", outcome.version_id).artifact.apply(x)
    # Which row each probed row is, raw or erased: its nearest neighbour among both (scikit-learn's search).
    index = NearestNeighbors(n_neighbors=1).fit(np.concatenate([x, erased]).astype(np.float64))
    assert len(seen) == 2 * len(PROBES)  # raw and erased rows, every probe
    for rows in seen:
        distance, found = index.kneighbors(rows)
        assert distance.max() < 1e-4
        probed = found[:, 0] % x.shape[0]
        assert held[probed].all()  # never a row the eraser was fitted on
        assert np.unique(probed).size == outcome.audit.n_heldout == rows.shape[0]
    protocol = outcome.card["audit"]["protocol"]
    assert protocol == {
        "scheme": HELD_OUT_KFOLD,
        "folds": 5,
        "seed": 0,
        "eraser_rows": outcome.card["data"]["fit_rows"],
    }
    assert outcome.card["data"]["fit_rows"] == int(np.count_nonzero(~held))
    shown = format_card(outcome.version_id, outcome.card)
    assert f"trained and tested only on the {outcome.audit.n_heldout} held-out rows the eraser never saw" in shown


def test_audit_notes_dead_coordinates_of_real_embeddings(profiles) -> None:  # type: ignore[no-untyped-def]
    eraser = LEACE().fit(profiles.x_fit, profiles.z_fit)
    report = audit(eraser, profiles.x_held, profiles.z_held, nonlinear=False)
    assert any("almost no spread" in note for note in report.notes)
    after = report.leakage.linear_after
    assert isinstance(after, ProbeScore)
    # The floored scaler must not let the probe read the dead coordinates
    # (an unfloored standard scaler recovers the attribute almost perfectly).
    assert after.accuracy < 0.7


_BLAS_THREADS_SEEN: list[int] = []
_OPENMP_THREADS_SEEN: list[int] = []


class _ThreadRecorder(ClassifierMixin, BaseEstimator):  # type: ignore[misc]
    """A majority-class model that notes how many BLAS and OpenMP threads it was given while fitting."""

    def fit(self, X: np.ndarray, y: np.ndarray) -> _ThreadRecorder:
        _BLAS_THREADS_SEEN.extend(info["num_threads"] for info in threadpool_info() if info["user_api"] == "blas")
        _OPENMP_THREADS_SEEN.extend(info["num_threads"] for info in threadpool_info() if info["user_api"] == "openmp")
        self.classes_, counts = np.unique(y, return_counts=True)
        self.majority_ = self.classes_[np.argmax(counts)]
        return self

    def predict(self, X: np.ndarray) -> np.ndarray:
        return np.full(len(X), self.majority_)


def test_probes_predict_each_row_as_cross_val_predict_does_fold_by_fold_on_one_thread() -> None:
    x, z = load_breast_cancer(return_X_y=True)
    folds = StratifiedKFold(5, shuffle=True, random_state=0)
    sizes = readers.fold_sizes(z, 5)
    # Reference: scikit-learn's cross_val_predict with the same folds, for every probe (bundled breast cancer set).
    for name in PROBES:
        model = readers.build_probe(name, 0, sizes=sizes, features=x.shape[1])
        with warnings.catch_warnings(), threadpool_limits(limits=1):  # the same figures, sooner
            warnings.simplefilter("ignore", ConvergenceWarning)
            expected = cross_val_predict(model, x, z, cv=folds)
        np.testing.assert_array_equal(probes.held_out_predictions(model, x, z, folds), expected)
    # Each finished fold is reported, and BLAS and OpenMP run on one thread meanwhile, whatever they had outside.
    reported: list[tuple[str, int, int | None]] = []
    _BLAS_THREADS_SEEN.clear()
    _OPENMP_THREADS_SEEN.clear()
    with threadpool_limits(limits=2), reporting(lambda *report: reported.append(report)):
        probes.held_out_predictions(_ThreadRecorder(), x, z, folds, stage="probe (folds)")
        _ThreadRecorder().fit(x, z)
    assert reported == [("probe (folds)", done, 5) for done in range(1, 6)]
    for seen in (_BLAS_THREADS_SEEN, _OPENMP_THREADS_SEEN):  # scikit-learn's boosted trees load OpenMP
        libraries = len(seen) // 6
        assert libraries >= 1
        assert seen[: 5 * libraries] == [1] * (5 * libraries)
        assert seen[5 * libraries :] == [2] * libraries
