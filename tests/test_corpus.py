"""Offline apply: chunked output equals the in-process eraser, other columns survive, the manifest is true."""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from veil.cleaning.corpus import apply_to_file, manifest_path
from veil.errors import DataError
from veil.registry import Registry, StoredVersion

from .conftest import planted
from .test_registry import version_files
from .tolerances import apply_bound, assert_same_answer


@pytest.fixture
def stored(tmp_path: Path) -> StoredVersion:
    registry = Registry(tmp_path / "registry")
    version_id = registry.add_version("corpus-test", version_files(5, d=6))
    return registry.read_version("corpus-test", version_id)


def test_npy_corpus_in_uneven_chunks_equals_one_transform(tmp_path: Path, stored: StoredVersion) -> None:
    x, _ = planted(n=101, d=6, seed=9)
    x = x.astype(np.float32)
    np.save(tmp_path / "in.npy", x)
    manifest = apply_to_file(stored, tmp_path / "in.npy", tmp_path / "out.npy", requested="live", chunk_rows=7)
    out = np.load(tmp_path / "out.npy")
    assert out.dtype == np.float32
    # Chunks of 7 rows take other BLAS paths than one batch of 101: equal to the float32 round-off bound only.
    assert_same_answer(out, stored.artifact.apply(x), apply_bound(stored.artifact, x), "chunks of 7")
    on_disk = json.loads(manifest_path(tmp_path / "out.npy").read_text())
    assert on_disk == manifest
    # hashlib is the reference for both checksums.
    assert manifest["input"]["sha256"] == hashlib.sha256((tmp_path / "in.npy").read_bytes()).hexdigest()
    assert manifest["output"]["sha256"] == hashlib.sha256((tmp_path / "out.npy").read_bytes()).hexdigest()
    assert manifest["version"] == stored.id
    assert manifest["input"]["rows"] == 101


@pytest.mark.parametrize("list_type", ["list", "large_list", "fixed_size_list"])
def test_parquet_corpus_keeps_other_columns_and_its_list_type(
    tmp_path: Path, stored: StoredVersion, list_type: str
) -> None:
    x, _ = planted(n=50, d=6, seed=10)
    x = x.astype(np.float32)
    values = pa.array(x.reshape(-1))
    offsets = np.arange(0, x.size + 1, 6)
    column = {
        "list": lambda: pa.ListArray.from_arrays(pa.array(offsets.astype(np.int32)), values),
        "large_list": lambda: pa.LargeListArray.from_arrays(pa.array(offsets.astype(np.int64)), values),
        "fixed_size_list": lambda: pa.FixedSizeListArray.from_arrays(values, 6),
    }[list_type]()
    ids = pa.array([f"doc-{i}" for i in range(50)])
    pq.write_table(
        pa.table({"id": ids, "vec": column, "score": pa.array(np.arange(50.0))}),
        tmp_path / "in.parquet",
        row_group_size=13,
    )
    apply_to_file(
        stored, tmp_path / "in.parquet", tmp_path / "out.parquet", requested="1", embeddings_key="vec", chunk_rows=8
    )
    table = pq.read_table(tmp_path / "out.parquet")
    assert table.column_names == ["id", "vec", "score"]
    assert table.schema.field("vec").type == column.type
    assert table.column("id").to_pylist() == ids.to_pylist()
    assert table.column("score").to_pylist() == list(np.arange(50.0))
    cleaned = np.array(table.column("vec").to_pylist(), dtype=np.float32)
    # Batches of at most 8 rows (and the row groups' 13) against one batch of 50: float32 round-off apart at most.
    assert_same_answer(cleaned, stored.artifact.apply(x), apply_bound(stored.artifact, x), "parquet batches")


def test_bad_corpora_are_refused_and_leave_nothing_behind(tmp_path: Path, stored: StoredVersion) -> None:
    x, _ = planted(n=30, d=6, seed=11)
    x[17, 2] = np.nan
    np.save(tmp_path / "nan.npy", x)
    np.save(tmp_path / "wide.npy", np.zeros((3, 9)))
    previous = b"an older cleaned corpus"
    (tmp_path / "out.npy").write_bytes(previous)
    with pytest.raises(DataError, match="row 17 holds NaN"):
        apply_to_file(stored, tmp_path / "nan.npy", tmp_path / "out.npy", requested="live", chunk_rows=5)
    with pytest.raises(DataError, match=r"9-dimensional embeddings but corpus-test v0001-\w+ expects 6"):
        apply_to_file(stored, tmp_path / "wide.npy", tmp_path / "out.npy", requested="live")
    with pytest.raises(DataError, match="keeps the input's format"):
        apply_to_file(stored, tmp_path / "wide.npy", tmp_path / "out.parquet", requested="live")
    with pytest.raises(DataError, match="would overwrite the input"):
        apply_to_file(stored, tmp_path / "wide.npy", tmp_path / "wide.npy", requested="live")
    with pytest.raises(DataError, match="does not exist"):
        apply_to_file(stored, tmp_path / "none.npy", tmp_path / "out.npy", requested="live")
    # The earlier output is untouched and no partial file or manifest is left.
    assert (tmp_path / "out.npy").read_bytes() == previous
    assert sorted(p.name for p in tmp_path.iterdir()) == ["nan.npy", "out.npy", "registry", "wide.npy"]
