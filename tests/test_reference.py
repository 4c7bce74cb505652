"""Reference statistics for the live checks, plot data and alert thresholds."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.decomposition import PCA

from veil import LEACE
from veil.audit.probes import linear_probe
from veil.checks.reference import ReferenceStatistics
from veil.checks.thresholds import AlertThresholds, Band
from veil.reporting import PlotData

from .conftest import planted


@pytest.mark.parametrize("classes", [2, 3])
def test_the_folded_probe_predicts_as_the_scikit_learn_pipeline(classes: int) -> None:
    rng = np.random.default_rng(3)
    x, _ = planted(n=900, d=8, seed=3)
    codes = rng.integers(0, classes, 900)
    x = x + np.eye(8)[codes % 8] * 2.0
    artifact = LEACE().fit(x, codes).export()
    reference = ReferenceStatistics.from_fit(artifact, x, codes, random_state=0)
    # Reference: the same scikit-learn pipeline, unfolded.
    pipeline = linear_probe(0).fit(x, codes)
    np.testing.assert_array_equal(reference.probe_codes(x), pipeline.predict(x))
    restored = ReferenceStatistics.from_bytes(reference.to_bytes())
    np.testing.assert_array_equal(restored.probe_weights, reference.probe_weights)
    assert restored.erased_variance_share == reference.erased_variance_share


def test_erased_variance_share_matches_the_empirical_share() -> None:
    x, z = planted(n=4000, d=10, seed=5)
    artifact = LEACE().fit(x, z).export()
    reference = ReferenceStatistics.from_fit(artifact, x, z, random_state=0)
    removed = x - artifact.map.apply(x)
    centred = x - x.mean(axis=0)
    empirical = np.sum(removed**2) / np.sum(centred**2)
    assert reference.erased_variance_share == pytest.approx(empirical, rel=1e-9)
    # Eigenvalues against numpy's spectrum of the (1/n) covariance.
    expected = np.sort(np.linalg.eigvalsh(np.cov(x.T, bias=True)))[::-1]
    np.testing.assert_allclose(reference.eigenvalues, expected, rtol=1e-9)


def test_plot_data_planes_match_scikit_learn_pca_up_to_sign() -> None:
    x, z = planted(n=500, d=7, seed=6)
    erased = LEACE().fit(x, z).transform(x)
    plots = PlotData.from_heldout(x, erased, z, seed=0)
    reference = PCA(n_components=2).fit_transform(x)
    for axis in range(2):
        np.testing.assert_allclose(
            np.abs(plots.plane_before[:, axis]), np.abs(reference[:, axis]), rtol=1e-4, atol=1e-5
        )
    centred = x - x.mean(axis=0)
    expected = np.sum((erased - x) ** 2, axis=1) / np.mean(np.sum(centred**2, axis=1))
    np.testing.assert_allclose(plots.distortion, expected, rtol=1e-5)
    again = PlotData.from_bytes(plots.to_bytes())
    np.testing.assert_array_equal(again.plane_after, plots.plane_after)


def test_thresholds_round_trip_and_refuse_nonsense() -> None:
    custom = AlertThresholds.from_dict({"leakage_gap": {"warn": 0.01, "alert": 0.03}})
    assert custom.leakage_gap == Band(0.01, 0.03)
    assert custom.mean_shift == AlertThresholds().mean_shift
    assert AlertThresholds.from_dict(custom.to_dict()) == custom
    with pytest.raises(ValueError, match="unknown threshold 'latency'"):
        AlertThresholds.from_dict({"latency": {"warn": 1, "alert": 2}})
    with pytest.raises(ValueError, match="warn <= alert"):
        Band(0.5, 0.1)
    with pytest.raises(ValueError, match="warn <= alert"):
        Band(float("nan"), 1.0)
