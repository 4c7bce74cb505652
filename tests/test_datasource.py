"""Reading labelled samples: every input format gives the same arrays, and bad input names its problem."""

from __future__ import annotations

import hashlib
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from veil.errors import DataError
from veil.samples.sources import load_labelled_sample

from .conftest import planted


@pytest.fixture
def arrays() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    x, z = planted(n=40, d=5, seed=4)
    return x.astype(np.float32), np.array(["north", "south"])[z], np.array(["a", "b", "c", "d"])[np.arange(40) % 4]


def write_parquet(path: Path, x: np.ndarray, columns: dict[str, np.ndarray], *, fixed: bool, groups: int = 1) -> None:
    values = pa.array(x.reshape(-1))
    if fixed:
        embedding = pa.FixedSizeListArray.from_arrays(values, x.shape[1])
    else:
        embedding = pa.ListArray.from_arrays(pa.array(np.arange(0, x.size + 1, x.shape[1], dtype=np.int32)), values)
    table = pa.table({"embedding": embedding, **{k: pa.array(v) for k, v in columns.items()}})
    pq.write_table(table, path, row_group_size=max(1, len(x) // groups))


def test_npz_npy_csv_and_parquet_read_alike(tmp_path: Path, arrays) -> None:  # type: ignore[no-untyped-def]
    x, z, task = arrays
    np.savez(tmp_path / "s.npz", embedding=x, pronoun=z, field=task)
    np.save(tmp_path / "s.npy", x)
    np.save(tmp_path / "z.npy", z)
    (tmp_path / "labels.csv").write_text(
        "pronoun,field\n" + "".join(f"{a},{b}\n" for a, b in zip(z, task, strict=True))
    )
    write_parquet(tmp_path / "s.parquet", x, {"pronoun": z, "field": task}, fixed=False, groups=3)
    write_parquet(tmp_path / "f.parquet", x, {"pronoun": z, "field": task}, fixed=True)
    samples = [
        load_labelled_sample(tmp_path / "s.npz", attribute="pronoun", task="field"),
        load_labelled_sample(tmp_path / "s.npy", attribute="pronoun", task="field", labels=tmp_path / "labels.csv"),
        load_labelled_sample(tmp_path / "s.parquet", attribute="pronoun", task="field"),
        load_labelled_sample(tmp_path / "f.parquet", attribute="pronoun", task="field"),
    ]
    for sample in samples:
        np.testing.assert_array_equal(sample.embeddings, x)
        assert sample.embeddings.dtype == np.float32
        assert list(sample.attribute) == list(z)
        assert sample.task is not None
        assert list(sample.task) == list(task)
    only_attribute = load_labelled_sample(tmp_path / "s.npy", attribute="pronoun", labels=tmp_path / "z.npy")
    assert list(only_attribute.attribute) == list(z)
    # The fingerprint covers every file read; hashlib is the reference for each file's sha256.
    assert samples[1].files == {
        str(tmp_path / "s.npy"): hashlib.sha256((tmp_path / "s.npy").read_bytes()).hexdigest(),
        str(tmp_path / "labels.csv"): hashlib.sha256((tmp_path / "labels.csv").read_bytes()).hexdigest(),
    }
    assert samples[0].fingerprint != samples[1].fingerprint


def test_bad_inputs_name_their_problem(tmp_path: Path, arrays) -> None:  # type: ignore[no-untyped-def]
    x, z, _ = arrays
    np.savez(tmp_path / "s.npz", embedding=x, pronoun=z, short=z[:-1], text=np.array(["x"] * 40))
    np.savez(tmp_path / "nan.npz", embedding=np.where(np.arange(40)[:, None] == 7, np.nan, x), pronoun=z)
    np.savez(tmp_path / "flat.npz", embedding=x[:, 0], pronoun=z)
    np.save(tmp_path / "s.npy", x)
    np.save(tmp_path / "obj.npy", np.array([object()] * 40, dtype=object), allow_pickle=True)
    (tmp_path / "broken.npz").write_bytes(b"not a zip")
    mixed = pa.table({"embedding": pa.array([[1.0, 2.0], [1.0, 2.0, 3.0]]), "pronoun": pa.array(["a", "b"])})
    pq.write_table(mixed, tmp_path / "mixed.parquet")
    cases = [
        (dict(path=tmp_path / "missing.npz", attribute="pronoun"), "does not exist"),
        (dict(path=tmp_path / "s.npz", attribute="gender"), "no array 'gender'; it holds"),
        (dict(path=tmp_path / "s.npz", attribute="short"), "have 39 rows but the embeddings have 40"),
        (dict(path=tmp_path / "s.npz", attribute="pronoun", embeddings_key="text"), "must be numbers"),
        (dict(path=tmp_path / "nan.npz", attribute="pronoun"), "NaN or infinite values \\(first at row 7\\)"),
        (dict(path=tmp_path / "flat.npz", attribute="pronoun"), "must be a 2-D array"),
        (dict(path=tmp_path / "broken.npz", attribute="pronoun"), "not a readable .npz"),
        (dict(path=tmp_path / "s.npy", attribute="pronoun"), "give the labels file"),
        (dict(path=tmp_path / "s.npy", attribute="pronoun", labels=tmp_path / "obj.npy"), "without unpickling"),
        (
            dict(path=tmp_path / "mixed.parquet", attribute="pronoun"),
            "mixes dimensions: row 0 has 2 values but row 1 has 3",
        ),
        (dict(path=tmp_path / "mixed.parquet", attribute="gender"), "no column 'gender'"),
        (dict(path=tmp_path / "s.txt", attribute="pronoun"), "does not exist"),
    ]
    (tmp_path / "s.csv").write_text("x\n")
    cases.append((dict(path=tmp_path / "s.csv", attribute="pronoun"), "unsupported input .csv"))
    for kwargs, message in cases:
        with pytest.raises(DataError, match=message):
            load_labelled_sample(**kwargs)  # type: ignore[arg-type]


def test_missing_labels_are_refused_with_count_and_first_row_or_dropped(tmp_path: Path, arrays) -> None:  # type: ignore[no-untyped-def]
    x, z, task = arrays
    pronoun, field = z.astype(object), task.astype(object)
    pronoun[[4, 9, 30]] = ["", " NA ", "n/a"]
    field[[9, 12]] = ["NaN", "null"]
    (tmp_path / "labels.csv").write_text(
        "pronoun,field,region\n" + "".join(f"{a},{b},{c}\n" for a, b, c in zip(pronoun, field, z, strict=True))
    )
    np.save(tmp_path / "s.npy", x)
    nulls = pa.table(
        {
            "embedding": pa.FixedSizeListArray.from_arrays(pa.array(x.reshape(-1)), x.shape[1]),
            "pronoun": pa.array([None if i in (4, 9, 30) else v for i, v in enumerate(z)]).dictionary_encode(),
            "field": pa.array([None if i in (9, 12) else i % 4 for i in range(40)], type=pa.int64()),
            "region": pa.array(z),
        }
    )
    pq.write_table(nulls, tmp_path / "s.parquet", row_group_size=16)
    numbers = np.where(np.isin(np.arange(40), [4, 9, 30]), np.nan, (z == "south").astype(float))
    np.savez(tmp_path / "s.npz", embedding=x, pronoun=numbers, field=np.arange(40) % 4)
    reads = {
        "csv": dict(path=tmp_path / "s.npy", labels=tmp_path / "labels.csv"),
        "parquet": dict(path=tmp_path / "s.parquet"),
        "npz": dict(path=tmp_path / "s.npz"),
    }
    for kind, where in reads.items():
        with pytest.raises(DataError, match=r"3 row\(s\) have no attribute label in 'pronoun' .* first at row 4 "):
            load_labelled_sample(**where, attribute="pronoun")  # type: ignore[arg-type]
        if kind != "npz":
            with pytest.raises(DataError, match=r"2 row\(s\) have no task label in 'field' .* first at row 9 "):
                load_labelled_sample(**where, attribute="region", task="field")  # type: ignore[arg-type]
        task_key = None if kind == "npz" else "field"
        sample = load_labelled_sample(**where, attribute="pronoun", task=task_key, drop_missing=True)  # type: ignore[arg-type]
        kept = ~np.isin(np.arange(40), [4, 9, 30] if kind == "npz" else [4, 9, 12, 30])
        assert sample.kept is not None
        np.testing.assert_array_equal(sample.kept, kept)
        assert (sample.rows, sample.dropped_rows) == (int(kept.sum()), int((~kept).sum()))
        np.testing.assert_array_equal(sample.embeddings, x[kept])
        expected = (z == "south").astype(float)[kept] if kind == "npz" else z[kept]
        assert list(sample.attribute) == list(expected)
        if kind == "parquet":  # a null in an integer column leaves the others integers
            assert sample.task is not None
            assert sample.task.dtype.kind == "i"
    # Nothing missing: nothing dropped, and the flag changes nothing.
    whole = load_labelled_sample(tmp_path / "s.npz", attribute="field", drop_missing=True)
    assert whole.kept is None
    assert whole.dropped_rows == 0
