"""Small classes: refused below the documented minimum, noted on the card below the few-rows level, merged on request.

The counts are checked against NumPy's count of the fitting rows (the split
recomputed from the row-index hash).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from numpy.typing import NDArray

from veil.defaults import FEW_CLASS_ROWS, MIN_CLASS_ROWS
from veil.errors import DataError
from veil.fitting.job import fit_version
from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, StoreSpec
from veil.registry import Registry
from veil.samples.attributes import split_strata
from veil.samples.sources import load_labelled_sample
from veil.samples.splitting import give_every_class_both_parts, holdout_mask


def _sample(folder: Path, rare: int, name: str = "people.npz") -> tuple[Path, NDArray[np.str_]]:
    """1000 rows: gender with classes f and m, and ``rare`` rows of class x; an age bracket."""
    rng = np.random.default_rng(5)
    n = 1000
    gender = rng.choice(np.array(["f", "m"]), size=n)
    gender[rng.choice(n, rare, replace=False)] = "x"
    bracket = rng.choice(np.array(["young", "old"]), size=n)
    x = rng.normal(size=(n, 8)).astype(np.float32)
    x[:, 0] += 2.0 * (gender == "m") - 2.0 * (gender == "x")
    x[:, 1] += 1.0 * (bracket == "old")
    path = folder / name
    np.savez(path, embedding=x, gender=gender, age_bracket=bracket)
    return path, gender


def _fit(path: Path, registry: Path, **options: object) -> dict[str, object]:
    sample = load_labelled_sample(path, attribute=["gender", "age_bracket"], **options)  # type: ignore[arg-type]
    outcome = fit_version(
        sample,
        FitRequest(MethodSpec("leace"), StoreSpec("people"), audit=AuditSpec(nonlinear=False)),
        registry=Registry(registry),
    )
    return outcome.card


def test_a_class_below_the_minimum_is_refused_with_its_remedy(tmp_path: Path) -> None:
    path, _ = _sample(tmp_path, rare=MIN_CLASS_ROWS)
    with pytest.raises(DataError, match=r"class 'x' of 'gender' has \d fitting row\(s\); a class needs at least 5"):
        _fit(path, tmp_path / "registry")
    assert not (tmp_path / "registry" / "people").exists()


def test_a_few_rows_class_is_noted_and_a_merged_one_is_fitted(tmp_path: Path) -> None:
    path, gender = _sample(tmp_path, rare=20)
    card = _fit(path, tmp_path / "registry")
    table = load_labelled_sample(path, attribute=["gender", "age_bracket"]).attribute
    held = give_every_class_both_parts(holdout_mask(gender.size, fraction=0.2, seed=0), split_strata(table))
    fitting_rows = int(np.count_nonzero((gender == "x") & ~held))
    assert fitting_rows < FEW_CLASS_ROWS
    assert f"class 'x' of 'gender' has only {fitting_rows} fitting rows (fewer than 30)" in " ".join(card["notes"])
    merged = _fit(path, tmp_path / "merged", merge_classes=["gender:x,m=m or x"])
    entry = merged["attributes"][0]
    assert entry["classes"] == ["f", "m or x"]
    table = load_labelled_sample(
        path, attribute=["gender", "age_bracket"], merge_classes=["gender:x,m=m or x"]
    ).attribute
    held = give_every_class_both_parts(holdout_mask(gender.size, fraction=0.2, seed=0), split_strata(table))
    assert entry["priors"][1] == pytest.approx(np.mean(np.isin(gender[~held], ["m", "x"])), abs=1e-12)
    assert any("classes x, m of 'gender' were merged into 'm or x'" in note for note in merged["notes"])


@pytest.mark.parametrize(
    ("merge", "message"),
    [
        ("gender:y=other", "'gender' has no class 'y'"),
        ("region:x=other", "--merge-classes names 'region', which is not a categorical attribute"),
        ("gender=x", "does not read as ATTRIBUTE:CLASS,CLASS=NEW"),
    ],
)
def test_bad_merges_are_refused_in_one_line(tmp_path: Path, merge: str, message: str) -> None:
    path, _ = _sample(tmp_path, rare=20)
    with pytest.raises(DataError, match=message):
        load_labelled_sample(path, attribute=["gender", "age_bracket"], merge_classes=[merge])
