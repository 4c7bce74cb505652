"""``veil fit --given COLUMN``: a version that guards its attribute within every value of a context, end to end."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from numpy.typing import NDArray

from veil.errors import DataError
from veil.fitting.job import fit_version
from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, ReadingSpec, StoreSpec
from veil.maps.artifact import MapArtifact
from veil.maps.linalg import COVARIANCE_RTOL
from veil.registry import Registry
from veil.registry.artifact_files import decode_artifact, encode_artifact
from veil.samples.harbourline import load_harbourline_profiles
from veil.samples.sources import load_labelled_sample
from veil.samples.splitting import give_every_class_both_parts, holdout_mask
from veil.samples.streaming import open_stream

from .test_cli import SAMPLE, run
from .test_context import planted, within_covariances
from .test_evidence_schema import _evidence, _validate
from .test_stored_versions import FIXTURE

EPS = float(np.finfo(np.float64).eps)


def _request(name: str, *, method: str = "leace", guard_population: bool = True, **reading: Any) -> FitRequest:
    """A fit guarded within ``field``, audited by the linear probe alone, read as ``reading`` says."""
    return FitRequest(
        MethodSpec(method, given="field", guard_population=guard_population),
        StoreSpec(name),
        audit=AuditSpec(nonlinear=False),
        reading=ReadingSpec(**reading),
    )


def committed_fit_rows(codes: NDArray[np.intp]) -> NDArray[np.bool_]:
    """The committed sample's rows `veil fit` fits on at its default split (held-out share 0.2, seed 0)."""
    return ~give_every_class_both_parts(holdout_mask(codes.size, fraction=0.2, seed=0), codes)  # as tests/test_cli.py


def live_coordinates(x: NDArray[np.float64]) -> NDArray[np.bool_]:
    """The coordinates with spread (variance above COVARIANCE_RTOL of the largest): the guarantee is about them.

    The others (veil.maps.linalg.dead_coordinates; all-MiniLM-L6-v2 has three) are pinned to one value.
    """
    variances = np.var(x, axis=0)
    return np.asarray(variances > COVARIANCE_RTOL * variances.max())


@pytest.mark.parametrize(("method", "within_only"), [("leace", False), ("meanproj", True)])
def test_a_stored_version_makes_the_class_means_coincide_within_every_field_on_its_fitting_rows(
    tmp_path: Path, method: str, within_only: bool
) -> None:
    registry = tmp_path / "r"
    options = ["--within-only"] if within_only else []
    fitted = run(
        "fit", "--data", SAMPLE, "--attribute", "pronoun", "--given", "field", *options, "--method", method,
        "--name", "profiles", "--registry", registry, "--probes", "linear",
    )  # fmt: skip
    assert fitted.code == 0, fitted.err
    stored = Registry(registry).read_version("profiles", fitted.out.strip().splitlines()[-1])

    sample = load_harbourline_profiles()
    codes = np.unique(sample.pronoun, return_inverse=True)[1]
    fit = committed_fit_rows(codes)
    x = sample.embedding[fit].astype(np.float64)
    z, field = sample.pronoun[fit], sample.field[fit]
    live = live_coordinates(x)
    erased = stored.artifact.apply(x)
    # NumPy's np.cov within each field is the reference; exact in real arithmetic, so float64 round-off relative
    # to what was there.
    before = within_covariances(x[:, live], z, field)
    after = within_covariances(erased[:, live], z, field)
    for was, now in zip(before, after, strict=True):
        assert np.abs(now).max() <= 1e-8 * np.abs(was).max()

    card = stored.card
    values, rows = np.unique(field, return_counts=True)
    assert card["given"] == {
        "columns": [{"column": "field", "values": values.tolist(), "rows": rows.tolist()}],
        "guard_population": not within_only,
    }
    assert card["request"]["fit"]["given"] == ["field"]
    assert card["request"]["fit"]["guard_population"] is not within_only
    # The evidence document validates against docs/version-evidence.schema.json (the jsonschema library).
    _validate(_evidence(registry, "profiles", "1"))
    shown = run("show", "profiles", "1", "--registry", registry)
    population = "not the population as a whole" if within_only else "the population as a whole too"
    assert f"guarded within each of the 5 values of 'field' ({fit.sum()} fitting rows); {population}" in shown.out


NAMES = {"npz": "s.npz", "shards": "shards", "labels": "labels.csv", "parquet": "s.parquet"}


def _write(folder: Path, x: NDArray[np.float64], z: NDArray[Any], field: NDArray[Any]) -> dict[str, Path]:
    """The same rows as .npz, as .npy shards with a .csv of labels, and as Parquet in row groups of 700."""
    folder.mkdir()
    np.savez(folder / "s.npz", embedding=x, z=z, field=field)
    (folder / "shards").mkdir()
    for index, part in enumerate(np.array_split(x, 3)):
        np.save(folder / "shards" / f"part-{index}.npy", part)
    rows = "\n".join(f"{a},{b}" for a, b in zip(z, field, strict=True))
    (folder / "labels.csv").write_text("z,field\n" + rows + "\n")
    table = pa.table({"embedding": list(x), "z": z, "field": field})
    pq.write_table(table, folder / "s.parquet", row_group_size=700)
    return {name: folder / file for name, file in NAMES.items()}


def test_streamed_and_dask_fits_equal_the_in_memory_fit(tmp_path: Path) -> None:
    x, z, field = planted(n=6000, seed=5)
    # Rows in the files sorted by field: most chunks hold one value, so the merges align values a chunk lacks.
    order = np.argsort(field, kind="stable")
    x, z, field = x[order], z[order], field[order]
    files = _write(tmp_path / "data", x, z, field)
    registry = Registry(tmp_path / "r")
    fits = {
        "memory": fit_version(load_labelled_sample(files["npz"], attribute="z", given="field"), _request("memory"),
                              registry=registry),
        "streamed": fit_version(open_stream(files["shards"], attribute="z", labels=files["labels"], given="field"),
                                _request("streamed", chunk_rows=700), registry=registry),
        "dask": fit_version(open_stream(files["parquet"], attribute="z", given="field"),
                            _request("dask", chunk_rows=700, engine="dask", workers=2), registry=registry),
    }  # fmt: skip
    artifacts = {key: registry.read_version(key, outcome.version_id).artifact for key, outcome in fits.items()}

    # NumPy's reference: each field's mean and Σ (x - x̄_g)(1[z = c] - p_g) over the fitting rows (the split hashes
    # the row index, whatever the chunking; no class needs a repair at this size).
    fit = ~holdout_mask(x.shape[0], fraction=0.2, seed=0)
    classes = np.unique(z)
    for key, artifact in artifacts.items():
        assert artifact.moments.given is not None, key
        given = artifact.moments.given.of("field")
        assert given.values.tolist() == np.unique(field).tolist()
        assert given.labels.tolist() == classes.tolist()
        for g, value in enumerate(given.values):
            rows = fit & (field == value)
            assert given.class_counts[g].tolist() == [int(np.count_nonzero(rows & (z == c))) for c in classes]
            centred = x[rows] - x[rows].mean(axis=0)
            indicators = (z[rows][:, None] == classes[None, :]) - np.mean(z[rows][:, None] == classes[None, :], 0)
            # Sums of n terms in float64: rounding of at most n·eps times the sum of their magnitudes (the
            # standard bound for recursive summation; a merge of partial sums stays within it).
            n = int(rows.sum())
            np.testing.assert_allclose(given.mean_x[g], x[rows].mean(axis=0), rtol=0, atol=n * EPS * np.abs(x).max())
            magnitude = np.abs(centred).T @ np.abs(indicators)
            error = np.abs(given.comoment_xz[g] - centred.T @ indicators)
            assert np.all(error <= 2 * n * EPS * magnitude), (key, value)

    # The maps: the moments agree to n·eps relative, and the whitening amplifies that by at most the covariance's
    # condition number (the first-order perturbation bound of a linear solve).
    sigma = np.cov(x[fit].T, bias=True)
    tolerance = np.linalg.cond(sigma) * fit.sum() * EPS * np.abs(x).max()
    reference = artifacts["memory"].apply(x)
    for key in ("streamed", "dask"):
        np.testing.assert_allclose(artifacts[key].apply(x), reference, rtol=0, atol=tolerance, err_msg=key)
    assert fits["dask"].card["given"] == fits["streamed"].card["given"] == fits["memory"].card["given"]
    assert fits["memory"].card["given"]["columns"][0]["rows"] == [
        int(np.count_nonzero(fit & (field == v))) for v in np.unique(field)
    ]


def test_the_artifact_keeps_the_per_value_moments_and_older_artifacts_load_without_them() -> None:
    from veil import LEACE

    x, z, field = planted(n=800, seed=6)
    guarded = LEACE().fit(x, z, given=field).export()
    loaded = decode_artifact(encode_artifact(guarded))
    assert loaded.moments.given is not None
    assert guarded.moments.given is not None
    assert loaded.moments.given.columns == guarded.moments.given.columns == ("given",)
    for name in ("values", "labels", "class_counts", "mean_x", "comoment_xz"):
        np.testing.assert_array_equal(
            getattr(loaded.moments.given.of("given"), name), getattr(guarded.moments.given.of("given"), name)
        )
    np.testing.assert_array_equal(loaded.apply(x), guarded.apply(x))
    # Written without a context, as every version before contexts was: the description has no "context" entry.
    plain: MapArtifact = decode_artifact(encode_artifact(LEACE().fit(x, z).export()))
    assert plain.moments.given is None
    # And the versions an older release stored (tests/fixtures/registry_0_1) still read, without per-value moments.
    registry = Registry(FIXTURE / "registry")
    assert registry.read_version("legacy", "v0001").artifact.moments.given is None


def _save(path: Path, x: NDArray[np.float64], z: NDArray[Any], field: NDArray[Any]) -> Path:
    np.savez(path, embedding=x, z=z, field=field)
    return path


def test_small_cells_are_refused_or_noted_by_value_and_class(tmp_path: Path) -> None:
    x, z, field = planted(n=3000, seed=7)
    fit = ~holdout_mask(x.shape[0], fraction=0.2, seed=0)
    welding = np.flatnonzero(fit & (field == "welding"))
    registry = Registry(tmp_path / "r")

    def fitted(she_rows: int) -> dict[str, Any]:
        # Every welding row "he", but the first ``she_rows`` fitting rows of welding.
        relabelled = np.where(field == "welding", "he", z)
        relabelled[welding[:she_rows]] = "she"
        sample = load_labelled_sample(_save(tmp_path / f"{she_rows}.npz", x, relabelled, field), attribute="z",
                                      given="field")  # fmt: skip
        card: dict[str, Any] = fit_version(sample, _request(f"cells-{she_rows}"), registry=registry).card
        return card

    # The small-class rules (veil.defaults: MIN_CLASS_ROWS = 5, FEW_CLASS_ROWS = 30) applied per (value, class).
    with pytest.raises(DataError, match=r"of 'field' .* fewer than 5 fitting rows: 'welding' \(class 'she' of 'z'"):
        fitted(3)
    assert not (tmp_path / "r").exists()
    noted = fitted(12)["notes"]
    assert any("class 'she' of 'z' has only 12 fitting rows where 'field' is 'welding'" in note for note in noted)
    one_class = fitted(0)
    assert any("where 'field' is 'welding' has class 'he' of 'z'" in note for note in one_class["notes"])
    assert one_class["given"]["columns"][0]["values"] == ["nursing", "plumbing", "teaching", "welding"]


def test_bad_contexts_are_refused_by_name(tmp_path: Path) -> None:
    common = ["--data", SAMPLE, "--attribute", "pronoun", "--name", "p", "--registry", tmp_path / "r"]
    refusals = [
        (["--given", "shift", "--method", "leace"], "has no array 'shift'"),
        (["--given", "field", "--method", "inlp"], "inlp cannot guard within a context (--given)"),
        (["--continuous", "age_bracket", "--given", "field", "--method", "leace"], "'age_bracket' is continuous"),
        (["--given", "field", "--given", "field", "--method", "leace"], "the context 'field' is given twice"),
        (["--pool-small-values", "--method", "leace"], "(--pool-small-values) needs a context column (--given)"),
        (["--given", "field", "--method", "leace", "--sweep"], "a sweep measures"),
        (["--within-only", "--method", "leace"], "(--within-only) needs a context column (--given)"),
        (["--given", "pronoun", "--method", "leace"], "the context 'pronoun' is an attribute"),
    ]
    for options, message in refusals:
        refused = run("fit", *common, *options)
        assert refused.code == 2, options
        assert message in refused.err
        assert len(refused.err.strip().splitlines()) == 1
    assert not (tmp_path / "r").exists()

    # Missing context values: refused like a missing label (the column, the count, the first row), or dropped.
    x, z, field = planted(n=1200, seed=8)
    gaps = np.arange(7, x.shape[0], 101)
    holes = field.astype(object)
    holes[gaps] = None
    np.save(tmp_path / "x.npy", x)
    text = np.where(np.isin(np.arange(x.shape[0]), gaps), "", field)
    (tmp_path / "labels.csv").write_text("z,field\n" + "\n".join(f"{a},{b}" for a, b in zip(z, text, strict=True)))
    table = pa.table({"embedding": list(x), "z": z, "field": pa.array(holes.tolist(), type=pa.string())})
    pq.write_table(table, tmp_path / "x.parquet", row_group_size=400)
    message = rf"{gaps.size} row\(s\) have no context label in 'field' .* first at row 7 "
    with pytest.raises(DataError, match=message):
        load_labelled_sample(tmp_path / "x.npy", attribute="z", labels=tmp_path / "labels.csv", given="field")
    with pytest.raises(DataError, match=message):
        open_stream(tmp_path / "x.parquet", attribute="z", given="field")
    dropped = open_stream(tmp_path / "x.parquet", attribute="z", given="field", drop_missing=True)
    assert dropped.dropped_rows == gaps.size
    outcome = fit_version(dropped, _request("dropped", chunk_rows=400), registry=Registry(tmp_path / "r2"))
    assert sum(outcome.card["given"]["columns"][0]["rows"]) == outcome.card["data"]["fit_rows"]
    assert outcome.card["data"]["missing_labels_dropped"] == gaps.size

    # The request and the sample must agree on the context, before the pass.
    plain = load_labelled_sample(tmp_path / "x.npy", attribute="z", labels=tmp_path / "labels.csv", drop_missing=True)
    with pytest.raises(DataError, match=r"read the sample with given=\('field',\)"):
        fit_version(plain, _request("mismatch"), registry=Registry(tmp_path / "r3"))
    assert not (tmp_path / "r3").exists()
