"""Streaming fits: the same eraser as in memory, from shards, memory-mapped files and Parquet, in bounded memory."""

from __future__ import annotations

import json
import tracemalloc
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from veil import INLP, LEACE, MeanProjection, attribute_table
from veil.errors import DataError
from veil.fitting.job import fit_version
from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, ReadingSpec, StoreSpec
from veil.registry import Registry
from veil.samples.sources import load_labelled_sample
from veil.samples.splitting import holdout_mask
from veil.samples.streaming import open_stream

from .test_cli import run

N, D = 6000, 12


@pytest.fixture(scope="module")
def data() -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(21)
    z = np.array(["north", "south", "west"])[rng.integers(0, 3, N)]
    x = rng.normal(size=(N, D)) @ rng.normal(size=(D, D)) / np.sqrt(D)
    x += np.where(z == "south", 1.0, 0.0)[:, None] * rng.normal(size=D) + np.where(z == "west", 1.0, 0.0)[:, None]
    return x.astype(np.float32), z


def _request(method: str, name: str, *, params: dict[str, Any] | None = None, **reading: Any) -> FitRequest:
    """A fit of ``method`` stored as ``name``, audited by the linear probe alone, read as ``reading`` says."""
    return FitRequest(
        MethodSpec(method, params=params or {}),
        StoreSpec(name),
        audit=AuditSpec(nonlinear=False),
        reading=ReadingSpec(**reading),
    )


def write_shards(folder: Path, x: np.ndarray, z: np.ndarray, pieces: int = 3) -> Path:
    folder.mkdir()
    for index, part in enumerate(np.array_split(x, pieces)):
        np.save(folder / f"part-{index:03d}.npy", part)
    (folder.parent / "labels.csv").write_text("region\n" + "\n".join(z) + "\n")
    return folder.parent / "labels.csv"


def fit_rows(holdout: float = 0.2, seed: int = 0) -> np.ndarray:
    return ~holdout_mask(N, fraction=holdout, seed=seed)


@pytest.mark.parametrize(("method", "reference"), [("leace", LEACE), ("meanproj", MeanProjection)])
def test_streamed_moment_fits_equal_the_in_memory_fit_of_the_same_rows(
    tmp_path: Path, data: tuple[np.ndarray, np.ndarray], method: str, reference: type
) -> None:
    x, z = data
    labels = write_shards(tmp_path / "shards", x, z)
    sample = open_stream(tmp_path / "shards", attribute="region", labels=labels)
    assert (sample.rows, sample.dim) == (N, D)
    outcome = fit_version(sample, _request(method, "stream", chunk_rows=777), registry=Registry(tmp_path / "r"))
    stored = Registry(tmp_path / "r").read_version("stream", outcome.version_id).artifact
    keep = fit_rows()
    expected = reference().fit(x[keep], z[keep])
    np.testing.assert_allclose(stored.apply(x), expected.transform(x), rtol=1e-9, atol=1e-6)
    assert outcome.card["data"]["fit_rows"] == int(keep.sum())
    assert outcome.card["data"]["rows"] == N


def test_streamed_inlp_with_the_moments_classifier_equals_its_in_memory_fit(
    tmp_path: Path, data: tuple[np.ndarray, np.ndarray]
) -> None:
    x, z = data
    np.save(tmp_path / "x.npy", x)
    np.save(tmp_path / "z.npy", z)
    sample = open_stream(tmp_path / "x.npy", attribute="region", labels=tmp_path / "z.npy")
    params = {"classifier": "moments", "max_iter": 8}
    outcome = fit_version(
        sample, _request("inlp", "stream", params=params, chunk_rows=1000), registry=Registry(tmp_path / "r")
    )
    stored = Registry(tmp_path / "r").read_version("stream", outcome.version_id).artifact
    keep = fit_rows()
    expected = INLP(classifier="moments", max_iter=8, random_state=0).fit(x[keep], z[keep])
    np.testing.assert_allclose(stored.apply(x), expected.transform(x), atol=1e-5)


def test_row_methods_fit_on_a_hash_sample_and_the_audit_on_a_bounded_sample(
    tmp_path: Path, data: tuple[np.ndarray, np.ndarray]
) -> None:
    x, z = data
    table = pa.table(
        {"embedding": pa.FixedSizeListArray.from_arrays(pa.array(x.reshape(-1)), D), "region": pa.array(z)}
    )
    pq.write_table(table, tmp_path / "s.parquet", row_group_size=1000)
    sample = open_stream(tmp_path / "s.parquet", attribute="region")
    request = FitRequest(
        MethodSpec("rlace", params={"max_iter": 30}),
        StoreSpec("stream"),
        audit=AuditSpec(nonlinear=False, rows=400),
        reading=ReadingSpec(chunk_rows=500, fit_sample_rows=1500),
    )
    outcome = fit_version(sample, request, registry=Registry(tmp_path / "r"))
    notes = " ".join(outcome.card["notes"])
    assert "rlace was fitted on a hash-drawn sample of" in notes
    drawn = int(notes.split("hash-drawn sample of ")[1].split()[0])
    assert 1200 < drawn < 1800  # about 1,500 of the ~4,800 fitting rows
    assert 300 < outcome.audit.n_heldout < 500  # about 400 of the ~1,200 held-out rows


def _streamed_peak(folder: Path, rows: int, dim: int = 64) -> int:
    rng = np.random.default_rng(22)
    z = rng.integers(0, 2, rows)
    np.save(folder / "x.npy", (rng.normal(size=(rows, dim)) + np.outer(z, np.eye(dim)[0])).astype(np.float32))
    np.save(folder / "z.npy", np.array(["a", "b"])[z])
    sample = open_stream(folder / "x.npy", attribute="g", labels=folder / "z.npy")
    tracemalloc.start()
    try:
        request = FitRequest(
            MethodSpec("leace"),
            StoreSpec("stream"),
            audit=AuditSpec(nonlinear=False, rows=500),
            reading=ReadingSpec(chunk_rows=2000),
        )
        fit_version(sample, request, registry=Registry(folder / "r"))
        return tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()


def test_a_streamed_fit_holds_chunks_not_the_data(tmp_path: Path) -> None:
    (tmp_path / "small").mkdir()
    (tmp_path / "large").mkdir()
    small = _streamed_peak(tmp_path / "small", 20_000)
    large = _streamed_peak(tmp_path / "large", 80_000)
    # Four times the rows, about the same peak (tracemalloc sees every NumPy allocation); and at 80,000
    # rows the peak is well under the data's own 20 MB (40 MB as float64).
    assert large < 1.5 * small, f"{small / 1e6:.1f} MB at 20k rows, {large / 1e6:.1f} MB at 80k rows"
    assert large < 80_000 * 64 * 4 / 2


def test_the_cli_streams_a_folder_of_shards(tmp_path: Path, data: tuple[np.ndarray, np.ndarray]) -> None:
    x, z = data
    labels = write_shards(tmp_path / "shards", x, z)
    result = run(
        "fit", "--data", tmp_path / "shards", "--labels", labels, "--attribute", "region", "--method", "leace",
        "--name", "stream", "--registry", tmp_path / "r", "--chunk-rows", "500", "--probes", "linear",
        "--progress", "always",
    )  # fmt: skip
    assert result.code == 0, result.err
    # Every phase of the streamed fit shows on stderr: the pass, the fit, each probe, storing.
    phases = ["reading (rows)", "fitting leace", "linear probe, raw (folds)", "linear probe, erased (folds)",
              "reference statistics", "storing the version"]  # fmt: skip
    assert [phase for phase in phases if f"{phase}: 100%" not in result.err] == []
    version = result.out.strip().splitlines()[-1]
    card = json.loads(run("show", "stream", version, "--registry", tmp_path / "r", "--json").out)
    assert card["data"]["rows"] == N
    assert any("audited on a hash-drawn sample" in note for note in card["notes"])


def test_bad_streamed_input_is_refused(tmp_path: Path, data: tuple[np.ndarray, np.ndarray]) -> None:
    x, z = data
    (tmp_path / "mixed").mkdir()
    np.save(tmp_path / "mixed" / "a.npy", x[:10])
    np.save(tmp_path / "mixed" / "b.npy", np.ones((10, D + 1), dtype=np.float32))
    np.save(tmp_path / "short.npy", z[:5])
    np.save(tmp_path / "x.npy", x)
    np.save(tmp_path / "one.npy", np.array(["north"] * N))
    (tmp_path / "empty").mkdir()
    cases = [
        (lambda: open_stream(tmp_path / "mixed", attribute="g", labels=tmp_path / "short.npy"), "different dimensions"),
        (lambda: open_stream(tmp_path / "x.npy", attribute="g", labels=tmp_path / "short.npy"), "have shape"),
        (lambda: open_stream(tmp_path / "x.npy", attribute="g"), "give the labels file"),
        (lambda: open_stream(tmp_path / "empty", attribute="g", labels=tmp_path / "short.npy"), "no .npy shards"),
        (lambda: open_stream(tmp_path / "nothing", attribute="g"), "does not exist"),
    ]
    for attempt, message in cases:
        with pytest.raises(DataError, match=message):
            attempt()
    one_class = open_stream(tmp_path / "x.npy", attribute="g", labels=tmp_path / "one.npy")
    with pytest.raises(DataError, match="single class"):
        fit_version(one_class, FitRequest(MethodSpec("leace"), StoreSpec("stream")), registry=Registry(tmp_path / "r"))
    assert not (tmp_path / "r").exists()


@pytest.mark.parametrize("method", ["leace", "meanproj"])
def test_the_dask_engine_equals_the_single_process_fit(
    tmp_path: Path, data: tuple[np.ndarray, np.ndarray], method: str
) -> None:
    # A LocalCluster with two worker processes, on shards written to a temporary folder.
    x, z = data
    labels = write_shards(tmp_path / "shards", x, z, pieces=4)
    sample = open_stream(tmp_path / "shards", attribute="region", labels=labels)
    local = fit_version(sample, _request(method, "local", chunk_rows=400), registry=Registry(tmp_path / "r"))
    distributed = fit_version(
        sample, _request(method, "dask", chunk_rows=400, engine="dask", workers=2), registry=Registry(tmp_path / "r")
    )
    registry = Registry(tmp_path / "r")
    one = registry.read_version("local", local.version_id).artifact
    many = registry.read_version("dask", distributed.version_id).artifact
    np.testing.assert_allclose(many.moments.comoment_xx, one.moments.comoment_xx, rtol=1e-9)
    np.testing.assert_allclose(many.apply(x.astype(np.float64)), one.apply(x.astype(np.float64)), rtol=1e-9, atol=1e-9)
    assert distributed.card["data"]["fit_rows"] == local.card["data"]["fit_rows"]
    assert distributed.audit.n_heldout == local.audit.n_heldout


def test_the_cli_fits_on_dask_and_refuses_what_needs_one_process(
    tmp_path: Path, data: tuple[np.ndarray, np.ndarray]
) -> None:
    x, z = data
    labels = write_shards(tmp_path / "shards", x, z)
    common = [
        *("--data", tmp_path / "shards", "--labels", labels, "--attribute", "region", "--name", "stream"),
        *("--registry", tmp_path / "r", "--probes", "linear", "--engine", "dask", "--chunk-rows", "1000"),
    ]
    fitted = run("fit", *common, "--method", "leace")
    assert fitted.code == 0, fitted.err
    refused = run("fit", *common, "--method", "inlp", "--option", "classifier=moments")
    assert refused.code == 2
    assert "fits sequentially" in refused.err


def test_a_streamed_fit_refuses_or_drops_missing_labels_like_the_in_memory_fit(
    tmp_path: Path, data: tuple[np.ndarray, np.ndarray]
) -> None:
    x, z = data
    gaps = np.arange(5, N, 97)
    region = pa.array([None if i in set(gaps.tolist()) else v for i, v in enumerate(z)])
    table = pa.table({"embedding": pa.FixedSizeListArray.from_arrays(pa.array(x.reshape(-1)), D), "region": region})
    pq.write_table(table, tmp_path / "s.parquet", row_group_size=700)
    # Refused before the pass, with the count and the first row.
    with pytest.raises(
        DataError, match=rf"{gaps.size} row\(s\) have no attribute label in 'region' .* first at row 5 "
    ):
        open_stream(tmp_path / "s.parquet", attribute="region")
    streamed = fit_version(
        open_stream(tmp_path / "s.parquet", attribute="region", drop_missing=True),
        _request("leace", "streamed", chunk_rows=700),
        registry=Registry(tmp_path / "r"),
    )
    in_memory = fit_version(
        load_labelled_sample(tmp_path / "s.parquet", attribute="region", drop_missing=True),
        _request("leace", "in-memory"),
        registry=Registry(tmp_path / "r"),
    )
    registry = Registry(tmp_path / "r")
    one = registry.read_version("streamed", streamed.version_id).artifact
    other = registry.read_version("in-memory", in_memory.version_id).artifact
    # Both fit on the rows with a label that the hash does not hold out, counted by their index in the file.
    keep = fit_rows() & ~np.isin(np.arange(N), gaps)
    assert streamed.card["data"]["fit_rows"] == in_memory.card["data"]["fit_rows"] == int(keep.sum())
    expected = LEACE().fit(x[keep], z[keep])
    for artifact in (one, other):
        np.testing.assert_allclose(artifact.apply(x), expected.transform(x), rtol=1e-9, atol=1e-6)
    for card in (streamed.card, in_memory.card):
        assert card["data"]["missing_labels_dropped"] == gaps.size
        assert card["data"]["rows"] == N - gaps.size
        assert card["attribute"]["classes"] == ["north", "south", "west"]


def test_several_attributes_stream_from_shards_parquet_and_dask(
    tmp_path: Path, data: tuple[np.ndarray, np.ndarray]
) -> None:
    x, z = data
    rng = np.random.default_rng(22)
    band = np.array(["low", "high"])[rng.integers(0, 2, N)]
    x = x + np.where(band == "high", 0.8, 0.0)[:, None].astype(np.float32)
    band_text = band.copy().astype("U4")
    band_text[rng.random(N) < 0.1] = ""  # incomplete labels: a tenth of the rows lack the band
    carried = band_text != ""
    shards = tmp_path / "shards"
    write_shards(shards, x, z)
    rows = "\n".join(f"{a},{b}" for a, b in zip(z, band_text, strict=True))
    (tmp_path / "labels.csv").write_text("region,band\n" + rows + "\n")
    names = ["region", "band"]
    keep = fit_rows()
    table = attribute_table(
        {"region": z[keep], "band": np.where(carried, band_text, "low")[keep]},
        joint=True,
        missing={"band": ~carried[keep]},
    )
    # LEACE in memory on the same fitting rows (the split hashes the row index, whatever the chunking).
    expected = LEACE().fit(x[keep], table).transform(x)
    pq.write_table(
        pa.table({"embedding": list(x), "region": z, "band": pa.array(band_text)}), tmp_path / "x.parquet",
        row_group_size=1000,
    )  # fmt: skip
    sources = [
        (open_stream(shards, attribute=names, labels=tmp_path / "labels.csv", joint=True, incomplete=True), "local"),
        (open_stream(tmp_path / "x.parquet", attribute=names, joint=True, incomplete=True), "local"),
        (open_stream(tmp_path / "x.parquet", attribute=names, joint=True, incomplete=True), "dask"),
    ]
    for number, (sample, engine) in enumerate(sources):
        assert sample.attribute_table
        outcome = fit_version(
            sample,
            _request("leace", f"several-{number}", chunk_rows=777, engine=engine, workers=2),
            registry=Registry(tmp_path / "r"),
        )
        stored = Registry(tmp_path / "r").read_version(f"several-{number}", outcome.version_id).artifact
        np.testing.assert_allclose(stored.apply(x), expected, rtol=1e-9, atol=1e-5)
        entries = {entry["name"]: entry for entry in outcome.card["attributes"]}
        assert entries["band"]["fit_rows"] == int(np.count_nonzero(keep & carried))
        assert entries["region&band"]["fit_rows"] == int(np.count_nonzero(keep & carried))
