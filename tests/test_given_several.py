"""Several contexts and several attributes: each attribute guarded within every value of each context column."""

from __future__ import annotations

import dataclasses
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import scipy.linalg
from numpy.typing import NDArray

from veil import LEACE, MeanProjection, attribute_table
from veil.errors import DataError
from veil.fitting.job import fit_version
from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, ReadingSpec, StoreSpec
from veil.maps.artifact import MapArtifact
from veil.maps.context import ContextMoments
from veil.maps.given import GivenMoments
from veil.maps.moments import MomentState
from veil.registry import Registry
from veil.registry.artifact_files import decode_artifact, encode_artifact
from veil.samples.harbourline import load_harbourline_profiles
from veil.samples.sources import load_labelled_sample
from veil.samples.splitting import holdout_mask
from veil.samples.streaming import open_stream

from .test_cli import SAMPLE, run
from .test_context import within_covariances
from .test_evidence_schema import _evidence, _validate
from .test_given_fit import committed_fit_rows, live_coordinates

Array = NDArray[np.float64]
Labels = NDArray[np.str_]
EPS = float(np.finfo(np.float64).eps)
ATTRIBUTES = ("pronoun", "age")
CONTEXTS = ("field", "region")


def planted(n: int = 4000, d: int = 48, seed: int = 0) -> tuple[Array, dict[str, Labels], dict[str, Labels]]:
    """Two attributes, each skewed by two contexts and read along its own direction within each of their values."""
    rng = np.random.default_rng(seed)
    given = {
        "field": rng.choice(["nursing", "plumbing", "teaching", "welding"], n),
        "region": rng.choice(["north", "south", "east"], n, p=[0.5, 0.3, 0.2]),
    }
    # Each attribute skewed by both columns: otherwise guarding within a column the attribute does not depend on
    # guards the population too (Cov(x', z) = E[Cov(x', z | c)] + Cov(E[x' | c], E[z | c]), the last term zero).
    she = {"nursing": 0.8, "plumbing": 0.2, "teaching": 0.6, "welding": 0.3}
    north = given["region"] == "north"
    share = np.vectorize(she.get)(given["field"]) * np.where(north, 1.2, 0.7)
    old = (given["field"] == "nursing") | (rng.random(n) < 0.3)
    labels = {
        "pronoun": np.where(rng.random(n) < share, "she", "he"),
        "age": np.where(old, "old", np.where(north, rng.choice(["young", "mid"], n), "mid")),
    }
    x = rng.normal(size=(n, d)) @ rng.normal(size=(d, d)) * 0.3
    for column in given.values():
        for value in np.unique(column):
            rows = column == value
            x[rows] += 3 * rng.normal(size=d)
            for attribute in labels.values():
                for label in np.unique(attribute)[1:]:
                    x[rows & (attribute == label)] += 0.5 * rng.normal(size=d)
    return x, labels, given


def every_within(x: Array, labels: dict[str, Labels], given: dict[str, Labels]) -> list[Array]:
    """``Cov(x, 1[z_a = c] | column = value)`` for every column, attribute, value and class (NumPy's ``np.cov``)."""
    return [block for column in given.values() for z in labels.values() for block in within_covariances(x, z, column)]


def population(x: Array, labels: dict[str, Labels]) -> list[Array]:
    """``Cov(x, 1[z_a = c])`` for every attribute (NumPy's ``np.cov``)."""
    out = []
    for z in labels.values():
        indicators = (z[:, None] == np.unique(z)[None, :]).astype(np.float64)
        out.append(np.cov(np.hstack([x, indicators]).T, bias=True)[: x.shape[1], x.shape[1] :])
    return out


@pytest.mark.parametrize("method", [LEACE, MeanProjection])
@pytest.mark.parametrize("guard_population", [True, False])
def test_every_attribute_is_guarded_within_every_value_of_each_context(method: type, guard_population: bool) -> None:
    x, labels, given = planted()
    z = attribute_table(labels)
    fitted = method(guard_population=guard_population).fit(x, z, given=given)
    # 22 directions at most (every value's classes less one, for each pair; the population's): far from all 48.
    assert fitted.map_.rank < x.shape[1] // 2
    erased = fitted.transform(x)
    scale = max(np.abs(block).max() for block in every_within(x, labels, given))
    # Exact in real arithmetic: float64 round-off relative to what was there.
    assert max(np.abs(block).max() for block in every_within(erased, labels, given)) <= 1e-8 * scale
    marginal = max(np.abs(block).max() for block in population(erased, labels))
    was = max(np.abs(block).max() for block in population(x, labels))
    if guard_population:
        assert marginal <= 1e-8 * was
    else:
        # What the contexts say about the attributes stays readable across values: six orders of magnitude above
        # the round-off the guarded population reaches (measured 0.028 of what was there).
        assert marginal > 0.01 * was


@pytest.mark.parametrize("guard_population", [True, False])
def test_the_least_change_among_affine_maps_with_every_guarantee(guard_population: bool) -> None:
    x, labels, given = planted(seed=1)
    fitted = LEACE(guard_population=guard_population).fit(x, attribute_table(labels), given=given)
    # An independent reference: minimise E‖(A - I)(x - μ)‖² subject to A C = 0, C every column to remove. The
    # minimiser is the generalised-least-squares projection A = I - C (Cᵀ Σ⁻¹ C)⁺ Cᵀ Σ⁻¹ (Σ = Cov(x)), here with
    # scipy.linalg; the pseudo-inverse takes the dependent columns (indicators sum to one) as they are.
    columns = every_within(x, labels, given) + (population(x, labels) if guard_population else [])
    c = np.hstack(columns)
    sigma = np.cov(x.T, bias=True)
    sigma_inv_c = scipy.linalg.solve(sigma, c, assume_a="pos")
    projection = c @ scipy.linalg.pinv(c.T @ sigma_inv_c) @ sigma_inv_c.T
    expected = x - (x - x.mean(axis=0)) @ projection.T
    np.testing.assert_allclose(fitted.transform(x), expected, rtol=0, atol=1e-9 * np.abs(x).max())


def test_several_columns_are_not_their_combinations() -> None:
    x, labels, given = planted(seed=2)
    z = labels["pronoun"]
    fitted = LEACE().fit(x, z, given=given)
    assert fitted.moments_.given is not None
    assert fitted.moments_.given.columns == CONTEXTS
    # Within a combination of a field and a region the class means still differ: that is another guarantee.
    combined = np.char.add(np.char.add(given["field"], "|"), given["region"])
    erased = fitted.transform(x)
    scale = max(np.abs(block).max() for block in within_covariances(x, z, combined))
    assert max(np.abs(block).max() for block in within_covariances(erased, z, combined)) > 1e-3 * scale
    # One column holding the combined value guards it.
    joint = LEACE().fit(x, z, given=combined).transform(x)
    assert max(np.abs(block).max() for block in within_covariances(joint, z, combined)) <= 1e-8 * scale


def test_chunks_merge_to_the_fit_of_all_rows_and_pooled_moments_are_final() -> None:
    x, labels, given = planted(seed=3)
    z = attribute_table(labels)
    whole = LEACE().fit(x, z, given=given)
    chunked = LEACE()
    for rows in np.array_split(np.argsort(given["region"], kind="stable"), 5):
        chunked.partial_fit(x[rows], z[rows], given={key: values[rows] for key, values in given.items()})
    np.testing.assert_allclose(chunked.transform(x), whole.transform(x), rtol=0, atol=1e-9 * np.abs(x).max())
    assert whole.moments_.given is not None
    pooled = whole.moments_.given.pooled("region", np.array(["east", "south"]))
    with pytest.raises(ValueError, match="pooled context values are final"):
        pooled.merge(pooled)


def _write(folder: Path, x: Array, labels: dict[str, Labels], given: dict[str, Labels]) -> dict[str, Path]:
    """The same rows as .npz, as .npy shards with a .csv of labels, and as Parquet in row groups of 700."""
    folder.mkdir()
    columns = {**labels, **given}
    np.savez(folder / "s.npz", embedding=x, **columns)
    (folder / "shards").mkdir()
    for index, part in enumerate(np.array_split(x, 3)):
        np.save(folder / "shards" / f"part-{index}.npy", part)
    lines = [",".join(columns)] + [",".join(row) for row in zip(*columns.values(), strict=True)]
    (folder / "labels.csv").write_text("\n".join(lines) + "\n")
    pq.write_table(pa.table({"embedding": list(x), **columns}), folder / "s.parquet", row_group_size=700)
    return {"npz": folder / "s.npz", "shards": folder / "shards", "labels": folder / "labels.csv",
            "parquet": folder / "s.parquet"}  # fmt: skip


def _request(name: str, *, pool: bool = True, **reading: Any) -> FitRequest:
    return FitRequest(
        MethodSpec("leace", given=CONTEXTS, pool_small_values=pool),
        StoreSpec(name),
        audit=AuditSpec(nonlinear=False),
        reading=ReadingSpec(**reading),
    )


def _with_rare_regions(seed: int) -> tuple[Array, dict[str, Labels], dict[str, Labels]]:
    """Rows of :func:`planted`, sorted by field, with two regions ("isles", "coast") of 16 fitting rows each, 3 of
    them "she": too few alone, enough pooled (6)."""
    x, labels, given = planted(n=5000, seed=seed)
    order = np.argsort(given["field"], kind="stable")
    x, labels, given = x[order], {k: v[order] for k, v in labels.items()}, {k: v[order] for k, v in given.items()}
    given["region"] = given["region"].astype("<U8")
    fitting = np.flatnonzero(~holdout_mask(x.shape[0], fraction=0.2, seed=0))  # the split the fits make
    for name, rows in (("isles", fitting[0::200][:16]), ("coast", fitting[100::200][:16])):
        given["region"][rows] = name
        labels["pronoun"][rows] = np.where(np.arange(16) < 3, "she", "he")
        labels["age"][rows] = np.where(np.arange(16) % 2 == 0, "mid", "old")
    return x, labels, given


def test_small_values_are_refused_by_name_or_pooled(tmp_path: Path) -> None:
    x, labels, given = _with_rare_regions(seed=4)
    files = _write(tmp_path / "data", x, labels, given)
    sample = load_labelled_sample(files["npz"], attribute=list(ATTRIBUTES), given=list(CONTEXTS))
    # The small-class rules (veil.defaults: MIN_CLASS_ROWS = 5) per (value, class): both values named.
    with pytest.raises(DataError, match=r"2 value\(s\) of 'region' .* 'coast' \(class .*'isles' \(class .*--pool"):
        fit_version(sample, _request("refused", pool=False), registry=Registry(tmp_path / "r"))
    assert not (tmp_path / "r").exists()

    outcome = fit_version(sample, _request("pooled"), registry=Registry(tmp_path / "r"))
    region = outcome.card["given"]["columns"][1]
    fit = ~holdout_mask(x.shape[0], fraction=0.2, seed=0)
    rare = np.isin(given["region"], ["coast", "isles"])
    assert region["pooled"] == {"values": ["coast", "isles"], "rows": int(np.count_nonzero(fit & rare))}
    assert region["values"] == ["east", "north", "south"]
    assert any("'coast', 'isles' of 'region'" in note and "together" in note for note in outcome.card["notes"])
    # The pooled group's guarantee holds for its rows together (np.cov over them as one group).
    artifact = Registry(tmp_path / "r").read_version("pooled", outcome.version_id).artifact
    erased = artifact.apply(x[fit])
    grouped = {"field": given["field"][fit], "region": np.where(rare[fit], "pooled", given["region"][fit])}
    fitted = {key: values[fit] for key, values in labels.items()}
    scale = max(np.abs(block).max() for block in every_within(x[fit], fitted, grouped))
    assert max(np.abs(block).max() for block in every_within(erased, fitted, grouped)) <= 1e-8 * scale
    _validate(_evidence(tmp_path / "r", "pooled", "1"))


def test_streamed_and_dask_fits_of_several_contexts_and_attributes_equal_the_in_memory_fit(tmp_path: Path) -> None:
    x, labels, given = _with_rare_regions(seed=5)
    files = _write(tmp_path / "data", x, labels, given)
    registry = Registry(tmp_path / "r")
    options: dict[str, Any] = {"attribute": list(ATTRIBUTES), "given": list(CONTEXTS)}
    fits = {
        "memory": fit_version(load_labelled_sample(files["npz"], **options), _request("memory"), registry=registry),
        "streamed": fit_version(open_stream(files["shards"], labels=files["labels"], **options),
                                _request("streamed", chunk_rows=700), registry=registry),
        "dask": fit_version(open_stream(files["parquet"], **options),
                            _request("dask", chunk_rows=700, engine="dask", workers=2), registry=registry),
    }  # fmt: skip
    artifacts = {key: registry.read_version(key, outcome.version_id).artifact for key, outcome in fits.items()}
    assert fits["dask"].card["given"] == fits["streamed"].card["given"] == fits["memory"].card["given"]
    reference = artifacts["memory"].moments.given
    assert reference is not None
    assert (reference.columns, reference.attributes) == (CONTEXTS, (*ATTRIBUTES,))
    fit = ~holdout_mask(x.shape[0], fraction=0.2, seed=0)
    for key in ("streamed", "dask"):
        moments = artifacts[key].moments.given
        assert moments is not None
        for ours, theirs in zip(moments.moments, reference.moments, strict=True):
            assert ours.values.tolist() == theirs.values.tolist()
            assert ours.pooled.tolist() == theirs.pooled.tolist()
            np.testing.assert_array_equal(ours.class_counts, theirs.class_counts)
            # Sums of at most n terms in float64, merged in another order: n·eps of their magnitudes.
            bound = fit.sum() * EPS * np.abs(x).max()
            np.testing.assert_allclose(ours.mean_x, theirs.mean_x, rtol=0, atol=bound)
            np.testing.assert_allclose(ours.comoment_xz, theirs.comoment_xz, rtol=0, atol=2 * fit.sum() * bound)
    # The maps: the moments agree to n·eps relative, amplified at most by the covariance's condition number.
    tolerance = np.linalg.cond(np.cov(x[fit].T, bias=True)) * fit.sum() * EPS * np.abs(x).max()
    for key in ("streamed", "dask"):
        np.testing.assert_allclose(
            artifacts[key].apply(x), artifacts["memory"].apply(x), rtol=0, atol=tolerance, err_msg=key
        )


def test_the_artifact_round_trips_every_pair_and_reads_versions_of_one_context() -> None:
    x, labels, given = planted(n=1500, seed=6)
    fitted = LEACE().fit(x, attribute_table(labels), given=given)
    assert fitted.moments_.given is not None
    pooled = fitted.moments_.given.pooled("region", np.array(["east"]))
    exported = fitted.export()
    for state in (exported, dataclasses.replace(exported, moments=_with_given(exported, pooled))):
        loaded = decode_artifact(encode_artifact(state))
        assert loaded.moments.given is not None
        assert state.moments.given is not None
        assert (loaded.moments.given.columns, loaded.moments.given.attributes) == (CONTEXTS, ATTRIBUTES)
        for ours, theirs in zip(loaded.moments.given.moments, state.moments.given.moments, strict=True):
            for name in ("values", "labels", "class_counts", "mean_x", "comoment_xz", "pooled"):
                np.testing.assert_array_equal(getattr(ours, name), getattr(theirs, name))
        assert encode_artifact(loaded) == encode_artifact(state)
    # A version stored with one context (arrays given.*, "context": true) reads as one unnamed pair, and is
    # written back byte for byte as it was.
    one = LEACE().fit(x, labels["pronoun"], given=given["field"]).export()
    assert one.moments.given is not None
    legacy = GivenMoments(("",), ("",), (ContextMoments(**{
        name: getattr(one.moments.given.moments[0], name)
        for name in ("values", "labels", "class_counts", "mean_x", "comoment_xz")
    }),))  # fmt: skip
    files = encode_artifact(dataclasses.replace(one, moments=_with_given(one, legacy)))
    assert b'"context": true' in files["artifact.json"]
    read = decode_artifact(files)
    assert read.moments.given is not None
    assert read.moments.given.columns == ("",)
    assert encode_artifact(read) == files
    np.testing.assert_array_equal(read.apply(x), one.apply(x))


def _with_given(artifact: MapArtifact, given: GivenMoments) -> MomentState:
    return dataclasses.replace(artifact.moments, given=given)


def test_veil_fit_given_twice_end_to_end(tmp_path: Path) -> None:
    registry = tmp_path / "r"
    fitted = run(
        "fit", "--data", SAMPLE, "--attribute", "pronoun", "--given", "field", "--given", "age_bracket",
        "--method", "leace", "--name", "profiles", "--registry", registry, "--probes", "linear",
    )  # fmt: skip
    assert fitted.code == 0, fitted.err
    stored = Registry(registry).read_version("profiles", fitted.out.strip().splitlines()[-1])
    sample = load_harbourline_profiles()
    codes = np.unique(sample.pronoun, return_inverse=True)[1]
    fit = committed_fit_rows(codes)
    x = sample.embedding[fit].astype(np.float64)
    live = live_coordinates(x)
    labels = {"pronoun": sample.pronoun[fit]}
    given = {"field": sample.field[fit], "age_bracket": sample.age_bracket[fit]}
    scale = max(np.abs(block).max() for block in every_within(x[:, live], labels, given))
    erased = stored.artifact.apply(x)[:, live]
    assert max(np.abs(block).max() for block in every_within(erased, labels, given)) <= 1e-8 * scale
    columns = stored.card["given"]["columns"]
    assert [entry["column"] for entry in columns] == ["field", "age_bracket"]
    assert columns[1]["values"] == np.unique(sample.age_bracket).tolist()
    assert stored.card["request"]["fit"]["given"] == ["field", "age_bracket"]
    # The audit reads within the first column only, and the card says so.
    assert any("reads 'field' only: 'age_bracket' guarded" in note for note in stored.card["notes"])
    _validate(_evidence(registry, "profiles", "1"))
    shown = run("show", "profiles", "1", "--registry", registry)
    both = "within each of the 5 values of 'field' and within each of the 3 values of 'age_bracket'"
    assert f"{both}, each column on its own" in shown.out
