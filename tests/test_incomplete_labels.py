"""Incomplete labels: each attribute's statistics from the rows that carry it, counted per attribute.

References: LEACE's guarantee (Belrose et al., 2023) on each attribute's own
rows, ``Cov(x', z_a) = 0`` to 1e-8 relative, since every attribute's
cross-covariance is removed from the same map; the counts against NumPy's.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from fastapi.testclient import TestClient
from numpy.typing import NDArray

from veil import LEACE, attribute_table
from veil.errors import DataError
from veil.fitting.job import fit_version
from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, StoreSpec
from veil.registry import Registry
from veil.registry.artifact_files import decode_artifact, encode_artifact
from veil.samples.attributes import split_strata
from veil.samples.sources import load_labelled_sample
from veil.samples.splitting import give_every_class_both_parts, holdout_mask

from .service_fixtures import app_for


def _people(
    n: int, seed: int = 0
) -> tuple[NDArray[np.float64], NDArray[np.str_], NDArray[np.str_], NDArray[np.float64]]:
    rng = np.random.default_rng(seed)
    gender = rng.choice(np.array(["f", "m"]), size=n)
    bracket = rng.choice(np.array(["young", "middle", "old"]), size=n)
    age = rng.uniform(18, 80, n)
    x = rng.normal(size=(n, 8))
    x[:, 0] += 2.0 * (gender == "m")
    x[:, 1] += 1.0 * (bracket == "old") - 1.0 * (bracket == "young")
    x[:, 2] += 0.05 * age
    return x, gender, bracket, age


def _cross(x: NDArray[np.floating], labels: NDArray[np.generic]) -> NDArray[np.float64]:
    onehot = (labels[:, None] == np.unique(labels)[None, :]).astype(float)
    return (x - x.mean(0)).T @ (onehot - onehot.mean(0)) / x.shape[0]


def test_each_attribute_is_guarded_on_the_rows_that_carry_it() -> None:
    x, gender, bracket, age = _people(3000)
    rng = np.random.default_rng(1)
    no_bracket = rng.random(3000) < 0.3
    no_gender = (rng.random(3000) < 0.2) & ~no_bracket
    z = attribute_table(
        {"gender": gender, "age_bracket": bracket, "age_years": age},
        continuous=["age_years"],
        joint=True,
        missing={"gender": no_gender, "age_bracket": no_bracket},
    )
    eraser = LEACE().fit(x, z)
    erased = eraser.transform(x)
    for name, labels, rows in (("gender", gender, ~no_gender), ("age_bracket", bracket, ~no_bracket)):
        before = np.linalg.norm(_cross(x[rows], labels[rows]))
        assert np.linalg.norm(_cross(erased[rows], labels[rows])) <= 1e-8 * before, name
        assert eraser.moments_.block(name).count == int(np.count_nonzero(rows))
    both = ~no_gender & ~no_bracket
    assert eraser.moments_.block("gender&age_bracket").count == int(np.count_nonzero(both))
    assert eraser.moments_.block("age_years").count == 3000
    stored = decode_artifact(encode_artifact(eraser.export()))
    np.testing.assert_allclose(stored.apply(x), erased)
    assert [state.count for state in stored.moments.partial] == [state.count for state in eraser.moments_.partial]
    with pytest.raises(ValueError, match="counterfactual targets need every attribute on the same rows"):
        eraser.counterfactual(x[:2], {"gender": "f", "age_bracket": "old", "age_years": 30})
    with pytest.raises(ValueError, match="1 row\\(s\\) lack every attribute, the first at row 0"):
        attribute_table(
            {"gender": gender[:3], "age_bracket": bracket[:3]},
            missing={"gender": np.array([True, False, False]), "age_bracket": np.array([True, False, True])},
        )


def test_a_fit_counts_each_attribute_s_rows(tmp_path: Path) -> None:
    x, gender, bracket, _ = _people(1500, seed=2)
    rng = np.random.default_rng(3)
    no_bracket = rng.random(1500) < 0.25
    with_blanks = np.where(no_bracket, "", bracket)
    np.savez(tmp_path / "people.npz", embedding=x.astype(np.float32), gender=gender, age_bracket=with_blanks)
    names = ["gender", "age_bracket"]
    with pytest.raises(DataError, match="have no attribute label in 'age_bracket'"):
        load_labelled_sample(tmp_path / "people.npz", attribute=names)
    sample = load_labelled_sample(tmp_path / "people.npz", attribute=names, incomplete=True, joint=True)
    registry = Registry(tmp_path / "registry")
    outcome = fit_version(
        sample,
        FitRequest(MethodSpec("leace"), StoreSpec("people", alias="live"), audit=AuditSpec(nonlinear=False)),
        registry=registry,
    )
    held = give_every_class_both_parts(holdout_mask(1500, fraction=0.2, seed=0), split_strata(sample.attribute))
    entries = {entry["name"]: entry for entry in outcome.card["attributes"]}
    assert entries["gender"]["fit_rows"] == int(np.count_nonzero(~held))
    assert entries["age_bracket"]["fit_rows"] == int(np.count_nonzero(~held & ~no_bracket))
    assert entries["gender&age_bracket"]["fit_rows"] == int(np.count_nonzero(~held & ~no_bracket))
    assert entries["age_bracket"]["audit"]["n_heldout"] == int(np.count_nonzero(held & ~no_bracket))
    assert entries["age_bracket"]["classes"] == ["middle", "old", "young"]
    assert any(note.startswith("incomplete labels: each attribute was fitted") for note in outcome.card["notes"])
    with TestClient(app_for(tmp_path / "registry")) as http:
        answer = http.post(
            "/v1/erasers/people/counterfactual",
            json={"vectors": x[:2].tolist(), "target": {"gender": "f", "age_bracket": "old"}},
        )
    assert answer.status_code == 422
    assert "incomplete labels" in answer.json()["error"]["message"]
