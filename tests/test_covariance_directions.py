"""LEACE's second-moment directions: where the class covariances differ, removed on top of LEACE's own."""

from __future__ import annotations

import io
import itertools
import warnings
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg
from numpy.typing import NDArray
from sklearn.discriminant_analysis import QuadraticDiscriminantAnalysis
from sklearn.model_selection import cross_val_score
from threadpoolctl import threadpool_limits

from veil import LEACE, MomentState
from veil.errors import DataError
from veil.fitting import job
from veil.fitting.job import fit_version
from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, ReadingSpec, StoreSpec
from veil.maps.attribute import encode_attribute
from veil.registry import Registry
from veil.registry.artifact_files import ARRAYS_FILE, content_digest, decode_artifact, encode_artifact
from veil.samples.splitting import holdout_mask
from veil.samples.streaming import open_stream

RTOL = 1e-9


def variance_planted(
    n: int, d: int, scales: tuple[float, ...], seed: int
) -> tuple[NDArray[np.float64], NDArray[np.int64], NDArray[np.float64]]:
    """Classes that differ only in the spread along one mixed direction, which is returned too.

    Every row comes with its negative, so each class's mean is zero up to rounding: LEACE has no direction to
    take, and the one direction taken is the covariance step's.  The mixing is a rotation times spreads between
    1 and 3, so sampling noise stays small in raw coordinates.
    """
    rng = np.random.default_rng(seed)
    z = np.repeat(rng.integers(0, len(scales), n // 2), 2)
    mixing = np.linalg.qr(rng.normal(size=(d, d)))[0] * np.linspace(1.0, 3.0, d)
    sources = rng.normal(size=(n // 2, d))
    sources = np.stack([sources, -sources], axis=1).reshape(-1, d)
    sources[:, 0] *= np.asarray(scales)[z]
    return sources @ mixing.T, z, mixing[:, 0]


def two_covariances(n: int = 5000, d: int = 10, seed: int = 1) -> tuple[NDArray[np.float64], NDArray[np.int64]]:
    """Two classes, each with its own mean and its own random covariance."""
    rng = np.random.default_rng(seed)
    z = rng.integers(0, 2, n)
    mixings = rng.normal(size=(2, d, d)) / np.sqrt(d)
    x = np.einsum("nd,nkd->nk", rng.normal(size=(n, d)), mixings[z]) + np.outer(z, rng.normal(size=d))
    return x, z


def generalised_gaps(x: NDArray[np.float64], z: NDArray[np.int64]) -> NDArray[np.float64]:
    """``|λ - 1|`` for the generalised eigenvalues of ``Σ₁ v = λ Σ_w v`` on the support of ``Σ_w``, decreasing.

    Reference: numpy.cov for each class's population covariance, scipy.linalg.orth for the support and
    scipy.linalg.eigh for the generalised symmetric-definite eigenproblem.
    """
    priors = np.array([np.mean(z == 0), np.mean(z == 1)])
    covariances = [np.cov(x[z == c].T, bias=True) for c in (0, 1)]
    within = priors[0] * covariances[0] + priors[1] * covariances[1]
    support = scipy.linalg.orth(within, rcond=1e-8)
    eigenvalues = scipy.linalg.eigh(
        support.T @ covariances[1] @ support, support.T @ within @ support, eigvals_only=True
    )
    return np.sort(np.abs(eigenvalues - 1.0))[::-1]


def test_zero_directions_is_leace_bit_for_bit_and_keeps_no_class_moments() -> None:
    x, z = two_covariances()
    plain = LEACE().fit(x, z)
    # The default accumulates no per-class co-moments (C d×d matrices a streamed fit must not hold) ...
    assert plain.moments_.class_comoments is None
    # ... and moments that carry them give exactly the same map when no covariance direction is asked for.
    with_classes = LEACE(covariance_directions=0).fit_moments(
        MomentState.from_batch(x, encode_attribute(z, x.shape[0]), by_class=True)
    )
    for name in ("mean", "u", "v"):
        assert np.array_equal(getattr(plain.map_, name), getattr(with_classes.map_, name))


@pytest.mark.parametrize("scales", [(0.5, 2.0), (0.5, 1.0, 2.0)])
def test_one_direction_finds_the_planted_spread_and_a_quadratic_reader_loses_it(scales: tuple[float, ...]) -> None:
    rows, labels, planted = variance_planted(12000, 8, scales, seed=3)
    x, z, x_held, z_held = rows[:8000], labels[:8000], rows[8000:], labels[8000:]
    eraser = LEACE(covariance_directions=1).fit(x, z)
    assert (eraser.rank_, eraser.n_covariance_directions_) == (1, 1)
    # The written direction U = W⁺q of the one added direction is the planted column of the mixing.
    found = eraser.map_.u[:, 0]
    assert abs(found @ planted) / (np.linalg.norm(found) * np.linalg.norm(planted)) >= 0.99
    # Reference: scikit-learn's QuadraticDiscriminantAnalysis, 5-fold on rows the eraser never saw.  It reads
    # class covariances, which LEACE alone leaves as they were.
    reader = QuadraticDiscriminantAnalysis(reg_param=1e-3)
    majority = np.bincount(z_held).max() / z_held.size
    before = cross_val_score(reader, x_held, z_held, cv=5).mean()
    leace_alone = cross_val_score(reader, LEACE().fit(x, z).transform(x_held), z_held, cv=5).mean()
    after = cross_val_score(reader, eraser.transform(x_held), z_held, cv=5).mean()
    assert before > majority + 0.15
    assert leace_alone > majority + 0.15
    assert after < majority + 0.03


@pytest.mark.parametrize("k", [1, 3])
def test_two_classes_lose_the_generalised_eigen_directions_farthest_from_one(k: int) -> None:
    x, z = two_covariances()
    leace_alone = generalised_gaps(LEACE().fit(x, z).transform(x), z)
    eraser = LEACE(covariance_directions=k).fit(x, z)
    after = generalised_gaps(eraser.transform(x), z)
    # For two classes the added directions are those of Σ₁ v = λ Σ_w v farthest from λ = 1 (the Fukunaga-Koontz
    # transform): on the erased fitting rows exactly those k generalised eigenvalues are gone, the rest remain.
    assert eraser.rank_ == 1 + k
    np.testing.assert_allclose(after, leace_alone[k:], rtol=0, atol=1e-8)


def test_the_whole_complement_leaves_classes_whose_covariances_agree() -> None:
    rng = np.random.default_rng(5)
    z = rng.integers(0, 3, 3000)
    x = np.einsum("nd,nkd->nk", rng.normal(size=(3000, 6)), rng.normal(size=(3, 6, 6))[z]) + rng.normal(size=(3, 6))[z]
    with pytest.warns(UserWarning, match="removed 4 of the 9 covariance directions"):
        eraser = LEACE(covariance_directions=9).fit(x, z)
    assert eraser.rank_ == 6  # C - 1 = 2 of LEACE's, then the 4 left of the 6-dimensional whitened space
    erased = eraser.transform(x)
    # Reference: numpy.cov of each class's erased fitting rows, against the raw spread.
    scale = np.trace(np.cov(x.T))
    for c in range(3):
        assert np.abs(np.cov(erased[z == c].T, bias=True)).max() <= 1e-12 * scale
    # Fewer directions leave less agreement: the whitened class covariance differences shrink as k grows.
    whitener = np.linalg.inv(scipy.linalg.sqrtm(np.cov(x.T, bias=True)).real)
    residual = []
    for k in range(5):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", UserWarning)
            rows = LEACE(covariance_directions=k).fit(x, z).transform(x) @ whitener
        pooled = np.cov(rows.T, bias=True)
        residual.append(
            sum(np.mean(z == c) * np.linalg.norm(np.cov(rows[z == c].T, bias=True) - pooled) ** 2 for c in range(3))
        )
    assert all(later < earlier for earlier, later in itertools.pairwise(residual))
    assert residual[-1] <= 1e-20


def test_tied_directions_are_not_picked_by_round_off() -> None:
    rng = np.random.default_rng(6)
    first = rng.normal(size=(1500, 7)) @ rng.normal(size=(7, 7)) + 1.0
    # The second class is the first scaled by 3: its covariance is 9 times the first's, so beside the mean
    # offset the whitened class covariances are multiples of the identity and every direction ties.
    x, z = np.vstack([first, 3.0 * first]), np.repeat([0, 1], 1500)
    with pytest.warns(UserWarning, match="removed 0 of the 2"):
        tied = LEACE(covariance_directions=2).fit(x, z)
    assert tied.rank_ == 1
    with threadpool_limits(limits=1, user_api="blas"), pytest.warns(UserWarning, match="removed 0 of the 2"):
        single = LEACE(covariance_directions=2).fit(x, z)
    np.testing.assert_allclose(single.map_.to_dense()[0], tied.map_.to_dense()[0], rtol=0, atol=1e-9)


def _assert_same_map(a: LEACE, b: LEACE, x: NDArray[np.float64]) -> None:
    # U and V are defined up to a rotation within the removed subspace; the map itself is unique.
    assert a.rank_ == b.rank_
    ua, ub = a.map_.u @ a.map_.v.T, b.map_.u @ b.map_.v.T
    assert np.linalg.norm(ua - ub) <= RTOL * max(np.linalg.norm(ua), 1.0)
    ta, tb = a.transform(x), b.transform(x)
    assert np.linalg.norm(ta - tb) <= RTOL * np.linalg.norm(ta)


@pytest.mark.parametrize("chunk", [1, 7, 250])
def test_partial_fit_over_chunks_equals_fit(chunk: int) -> None:
    x, z = two_covariances(n=1500, d=6, seed=7)
    x = x + 1e3  # far from zero: the per-class pairwise update must not lose digits
    whole = LEACE(covariance_directions=3).fit(x, z)
    streamed = LEACE(covariance_directions=3)
    for start in range(0, len(x), chunk):
        streamed.partial_fit(x[start : start + chunk], z[start : start + chunk])
    _assert_same_map(whole, streamed, x)


def test_merged_class_moments_match_numpy_and_classes_may_appear_late() -> None:
    x, z = two_covariances(n=1200, d=5, seed=8)
    labels = np.array(["a", "b", "c"])[np.where(z == 1, 2, np.arange(1200) % 2)]
    order = np.argsort(labels, kind="stable")  # all "a" rows, then "b", then "c"
    state = MomentState.empty(5, 1, np.array(["a"]), by_class=True)
    for rows in np.array_split(order, 5):
        chunk = MomentState.from_batch(x[rows] + 50.0, encode_attribute(labels[rows], rows.size), by_class=True)
        state = state.merge(chunk)
    # Reference: numpy.cov (population normalisation) of each class's rows at once.
    for index, label in enumerate(["a", "b", "c"]):
        np.testing.assert_allclose(state.class_covariances[index], np.cov(x[labels == label].T, bias=True), rtol=1e-10)
    assert state.class_counts.tolist() == [int(np.sum(labels == c)) for c in ("a", "b", "c")]
    merged = LEACE(covariance_directions=2).fit_moments(state)
    _assert_same_map(LEACE(covariance_directions=2).fit(x + 50.0, labels), merged, x + 50.0)


def test_rounding_noise_in_the_moments_does_not_move_the_map() -> None:
    x, z = two_covariances(n=4000, d=12, seed=9)
    exact = LEACE(covariance_directions=4).fit(x, z)
    moments = exact.moments_
    assert moments.class_comoments is not None
    rng = np.random.default_rng(0)
    for relative in (1e-14, 1e-13, 1e-12):
        noise = rng.normal(size=moments.class_comoments.shape)
        noisy = MomentState(
            count=moments.count,
            mean_x=moments.mean_x,
            mean_z=moments.mean_z,
            comoment_xx=moments.comoment_xx,
            comoment_xz=moments.comoment_xz,
            comoment_zz=moments.comoment_zz,
            labels=moments.labels,
            class_comoments=moments.class_comoments * (1 + relative * (noise + noise.transpose(0, 2, 1)) / 2),
        )
        refitted = LEACE(covariance_directions=4).fit_moments(noisy)
        assert refitted.rank_ == exact.rank_
        np.testing.assert_allclose(refitted.map_.to_dense()[0], exact.map_.to_dense()[0], rtol=0, atol=1e-9)


def test_float32_stays_float32() -> None:
    x, z = two_covariances(seed=10)
    x32 = x.astype(np.float32)
    eraser = LEACE(covariance_directions=2).fit(x32, z)
    assert eraser.transform(x32).dtype == np.float32
    # The statistics are float64 whatever the input: the same rows given as float64 give the same map.
    _assert_same_map(eraser, LEACE(covariance_directions=2).fit(x32.astype(np.float64), z), x)


def test_dead_coordinates_hold_one_value_and_feed_nothing() -> None:
    x, z = two_covariances(n=3000, d=8, seed=11)
    x[:, 3] = 1e-20 * z  # a coordinate the data do not use, with a rounding-level copy of the attribute
    eraser = LEACE(covariance_directions=3).fit(x, z)
    erased = eraser.transform(x)
    assert np.ptp(erased[:, 3]) == 0
    # Nor does it leak into the others: the same fit without that coordinate cleans them the same way.
    without = LEACE(covariance_directions=3).fit(np.delete(x, 3, axis=1), z).transform(np.delete(x, 3, axis=1))
    np.testing.assert_allclose(np.delete(erased, 3, axis=1), without, atol=1e-12)


def test_bad_settings_are_refused_with_one_line() -> None:
    x, z = two_covariances(n=200, d=4)
    for value in (-1, 1.5, True):
        with pytest.raises(ValueError, match="covariance_directions must be a non-negative integer"):
            LEACE(covariance_directions=value).fit(x, z)  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="per-class moments need 1-D class labels"):
        LEACE(covariance_directions=1).fit(x, np.column_stack([z, 1 - z]))
    with pytest.raises(ValueError, match="need per-class co-moments"):
        LEACE(covariance_directions=1).fit_moments(MomentState.from_batch(x, encode_attribute(z, 200)))


def test_a_streamed_fit_equals_the_in_memory_fit_of_the_same_rows(tmp_path: Path) -> None:
    x, z = two_covariances(n=6000, d=12, seed=12)
    labels = np.array(["north", "south"])[z]
    np.save(tmp_path / "x.npy", x.astype(np.float32))
    np.save(tmp_path / "z.npy", labels)
    sample = open_stream(tmp_path / "x.npy", attribute="region", labels=tmp_path / "z.npy")
    request = FitRequest(
        MethodSpec("leace", params={"covariance_directions": 4}),
        StoreSpec("stream"),
        audit=AuditSpec(nonlinear=False),
        reading=ReadingSpec(chunk_rows=777),
    )
    outcome = fit_version(sample, request, registry=Registry(tmp_path / "r"))
    stored = Registry(tmp_path / "r").read_version("stream", outcome.version_id).artifact
    keep = ~holdout_mask(6000, fraction=0.2, seed=0)
    expected = LEACE(covariance_directions=4).fit(x.astype(np.float32)[keep], labels[keep])
    assert stored.map.describe()["rank"] == 5
    np.testing.assert_allclose(stored.apply(x), expected.transform(x), rtol=1e-9, atol=1e-9)


def test_versions_store_no_class_moments_and_serve_the_same_map() -> None:
    x, z = two_covariances(n=1000, d=6, seed=13)
    artifact = LEACE(covariance_directions=2).fit(x, z).export()
    files = encode_artifact(artifact)
    # The per-class co-moments are only needed to fit: a version does not carry C d×d matrices.
    with np.load(io.BytesIO(files[ARRAYS_FILE]), allow_pickle=False) as stored:
        assert all(stored[name].ndim <= 2 for name in stored.files)
    loaded = decode_artifact(files)
    assert loaded.moments.class_comoments is None
    np.testing.assert_array_equal(loaded.apply(x), artifact.apply(x))
    assert content_digest(loaded) == content_digest(artifact)


def test_the_fitting_job_refuses_a_bad_setting_before_reading_rows(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    def no_pass(*args: object) -> None:
        raise AssertionError("the pass over the sample ran")

    monkeypatch.setattr(job, "_local_pass", no_pass)
    x, z = two_covariances(n=600, d=4, seed=14)
    np.save(tmp_path / "x.npy", x)
    np.save(tmp_path / "z.npy", z)
    sample = open_stream(tmp_path / "x.npy", attribute="g", labels=tmp_path / "z.npy")
    with pytest.raises(DataError, match="covariance_directions must be a non-negative integer, got -1"):
        fit_version(
            sample,
            FitRequest(
                MethodSpec("leace", params={"covariance_directions": -1}),
                StoreSpec("bad"),
                audit=AuditSpec(nonlinear=False),
            ),
            registry=Registry(tmp_path / "r"),
        )
