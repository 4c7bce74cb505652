"""Coordinates without spread: every map kind pins them, and a reader that standardises finds nothing there."""

from __future__ import annotations

import warnings
from dataclasses import replace

import numpy as np
import pytest
from numpy.typing import NDArray
from sklearn.ensemble import HistGradientBoostingClassifier
from sklearn.exceptions import ConvergenceWarning
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import StratifiedKFold, cross_val_predict
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from threadpoolctl import threadpool_limits

from tests.conftest import Split
from veil import INLP, LEACE, RLACE, GaussianTransport, MeanProjection
from veil.erasers._base import Erasure
from veil.maps.artifact import MapArtifact
from veil.maps.pins import CoordinatePins
from veil.registry.artifact_files import DESCRIPTION_FILE, decode_artifact, encode_artifact
from veil.registry.card import pins_text

METHODS = {
    "leace": lambda: LEACE(),
    "meanproj": lambda: MeanProjection(),
    "inlp": lambda: INLP(classifier="moments", max_iter=8),
    "rlace": lambda: RLACE(random_state=0),
    # A few barycentre steps: the pins do not depend on convergence, and each step costs d×d eigendecompositions.
    "transport": lambda: GaussianTransport(max_iter=5, random_state=0),
}


def _dead(x: NDArray[np.floating]) -> NDArray[np.intp]:
    # Independent of veil: numpy's variance, at most 1e-10 of the largest (all-MiniLM-L6-v2 has three such).
    variances = np.asarray(x, dtype=np.float64).var(axis=0)
    return np.flatnonzero(variances <= 1e-10 * variances.max())


def _read(model: object, x: NDArray[np.floating], z: NDArray[np.generic]) -> float:
    """Held-out accuracy of ``model`` by 3-fold stratified cross-validation (scikit-learn)."""
    folds = StratifiedKFold(3, shuffle=True, random_state=0)
    # One BLAS/OpenMP thread: small fits, where a second thread only adds start-up and spin-waiting.
    with warnings.catch_warnings(), threadpool_limits(limits=1):
        warnings.simplefilter("ignore", ConvergenceWarning)
        return float(np.mean(cross_val_predict(model, x, z, cv=folds) == z))


def _standardised_linear() -> object:
    return make_pipeline(StandardScaler(), LogisticRegression(max_iter=2000))


def _trees() -> object:
    return HistGradientBoostingClassifier(max_iter=20, random_state=0)


@pytest.fixture(scope="module")
def fitted(profiles: Split) -> dict[str, Erasure]:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        return {name: make().fit(profiles.x_fit, profiles.z_fit) for name, make in METHODS.items()}


@pytest.mark.parametrize("method", sorted(METHODS))
def test_coordinates_without_spread_add_nothing_to_a_standardised_linear_probe_or_trees(
    method: str, fitted: dict[str, Erasure], profiles: Split
) -> None:
    dead = _dead(profiles.x_fit)
    assert dead.size == 3
    erased = fitted[method].transform(profiles.x_held)
    without = np.delete(erased, dead, axis=1)
    # The criterion: with those coordinates a reader reads no more than without them, within 0.01.
    for reader in (_standardised_linear, _trees):
        assert _read(reader(), erased, profiles.z_held) <= _read(reader(), without, profiles.z_held) + 0.01


def test_a_version_without_pins_carries_the_attribute_there(fitted: dict[str, Erasure], profiles: Split) -> None:
    # The channel the pins close, seen with scikit-learn alone: LEACE's rows with the three coordinates passed
    # through (a version stored before pinning) tell the pronoun to a standardised linear probe better than the
    # same rows without them (measured: 0.672 against 0.579, majority 0.509).
    unpinned = replace(fitted["leace"].export(), pins=None).apply(profiles.x_held)
    without = np.delete(unpinned, _dead(profiles.x_fit), axis=1)
    assert (
        _read(_standardised_linear(), unpinned, profiles.z_held)
        > _read(_standardised_linear(), without, profiles.z_held) + 0.05
    )


def test_a_version_stored_before_pinning_loads_and_answers_as_before(
    fitted: dict[str, Erasure], profiles: Split
) -> None:
    old = replace(fitted["leace"].export(), pins=None)
    files = encode_artifact(old)
    assert b'"format_version": 2' in files[DESCRIPTION_FILE]
    loaded = decode_artifact(files)
    assert loaded.pins is None
    rows = profiles.x_held[:50]
    np.testing.assert_array_equal(loaded.apply(rows), old.map.apply(rows))
    assert "stored before pinning" in pins_text({})


def test_the_pins_survive_storage_and_refuse_bad_values(fitted: dict[str, Erasure]) -> None:
    artifact = fitted["transport"].export()
    loaded = decode_artifact(encode_artifact(artifact))
    assert loaded.pins is not None
    assert artifact.pins is not None
    np.testing.assert_array_equal(loaded.pins.coordinates, artifact.pins.coordinates)
    np.testing.assert_array_equal(loaded.pins.values, artifact.pins.values)
    assert "hold the fitting mean" in pins_text({"pinned_coordinates": loaded.pins.coordinates.tolist()})
    with pytest.raises(ValueError, match="distinct, increasing"):
        CoordinatePins(coordinates=np.array([3, 3]), values=np.zeros(2))
    with pytest.raises(ValueError, match="outside the dimension"):
        MapArtifact(**{**vars(artifact), "pins": CoordinatePins(coordinates=np.array([999]), values=np.zeros(1))})


def test_normalised_rows_hold_the_pinned_value_after_normalising(profiles: Split) -> None:
    eraser = LEACE(normalize=True).fit(profiles.x_fit, profiles.z_fit)
    erased = eraser.transform(profiles.x_held.astype(np.float64))
    pins = eraser.pins_
    np.testing.assert_array_equal(erased[:, pins.coordinates], np.broadcast_to(pins.values, (erased.shape[0], 3)))
    # Unit length to within the pinned values' squares (below 1e-15 here) and float64 round-off.
    norms = np.linalg.norm(erased, axis=1)
    assert np.max(np.abs(norms - 1)) <= float(np.sum(pins.values**2)) + 16 * np.finfo(np.float64).eps


def test_a_pinned_coordinate_far_from_zero_leaves_every_normalised_row_the_same_length() -> None:
    # A coordinate constant at 0.5 in the fitting rows (a sentinel feature, say): the map's own value there must
    # not enter the norm, or each row's length, and with it its norm before normalising, would show.
    rng = np.random.default_rng(3)
    x = rng.normal(size=(400, 6))
    z = (x[:, 0] + 0.3 * rng.normal(size=400) > 0).astype(int)
    x[:, 3] = 0.5
    eraser = LEACE(normalize=True).fit(x, z)
    assert eraser.pins_.coordinates.tolist() == [3]
    moved = x + rng.normal(scale=0.1, size=x.shape)  # serving rows: the coordinate is not constant there
    norms = np.linalg.norm(eraser.transform(moved), axis=1)
    np.testing.assert_allclose(norms, np.sqrt(1 + 0.5**2), rtol=8 * np.finfo(np.float64).eps)
