"""Several attributes end to end: fitted, stored, shown, served; counterfactuals and live checks per attribute.

References: the stored map is checked against LEACE fitted in process on the
same fitting rows (the split recomputed from the row-index hash), and against
LEACE's guarantee on its own fitting statistics (``Cov(x', z) = 0`` for the
stacked encoding, Belrose et al. 2023); the leakage figures against
scikit-learn's ``LogisticRegression``.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import jsonschema
import numpy as np
import pytest
from fastapi.testclient import TestClient
from numpy.typing import NDArray
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import train_test_split

from veil import LEACE, attribute_table
from veil.checks.reference import ReferenceStatistics
from veil.fitting.fresh_audit import audit_stored_version
from veil.fitting.job import fit_version
from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, StoreSpec
from veil.registry import Registry
from veil.registry.card import format_card
from veil.registry.evidence import version_evidence
from veil.samples.attributes import split_strata
from veil.samples.sources import load_labelled_sample
from veil.samples.splitting import give_every_class_both_parts, holdout_mask
from veil_client import VeilClient

from .service_fixtures import app_for

NAME = "people"


def _people(folder: Path, seed: int, n: int = 1500) -> tuple[NDArray[np.float32], NDArray[np.str_], NDArray[np.str_]]:
    """Embeddings with a gender (one class of 8%), an age bracket, and a signal only their combination carries."""
    rng = np.random.default_rng(seed)
    gender = rng.choice(np.array(["f", "m", "x"]), size=n, p=[0.5, 0.42, 0.08])
    bracket = rng.choice(np.array(["under 30", "30 to 50", "over 50"]), size=n)
    x = rng.normal(size=(n, 12))
    x[:, 0] += 2.0 * (gender == "m") - 1.5 * (gender == "x")
    x[:, 1] += 1.5 * (bracket == "over 50")
    x[:, 2] += 2.0 * ((gender == "m") ^ (bracket == "over 50"))
    x = x.astype(np.float32)
    np.savez(folder / f"people-{seed}.npz", embedding=x, gender=gender, age_bracket=bracket)
    return x, gender, bracket


@dataclass(frozen=True)
class Stored:
    registry: Path
    version: str
    x: NDArray[np.float32]
    gender: NDArray[np.str_]
    bracket: NDArray[np.str_]
    held: NDArray[np.bool_]


@pytest.fixture(scope="module")
def stored(tmp_path_factory: pytest.TempPathFactory) -> Stored:
    folder = tmp_path_factory.mktemp("attributes")
    x, gender, bracket = _people(folder, seed=3)
    sample = load_labelled_sample(folder / "people-3.npz", attribute=["gender", "age_bracket"], joint=True)
    registry = Registry(folder / "registry")
    outcome = fit_version(
        sample,
        FitRequest(MethodSpec("leace"), StoreSpec(NAME, alias="live"), audit=AuditSpec(nonlinear=False)),
        registry=registry,
    )
    held = give_every_class_both_parts(holdout_mask(len(x), fraction=0.2, seed=0), split_strata(sample.attribute))
    return Stored(folder / "registry", outcome.version_id, x, gender, bracket, held)


def test_the_stored_version_guards_every_attribute_and_the_intersection(stored: Stored) -> None:
    version = Registry(stored.registry).read_version(NAME, stored.version)
    fit = ~stored.held
    table = attribute_table({"gender": stored.gender, "age_bracket": stored.bracket}, joint=True)
    expected = LEACE().fit(stored.x[fit], table[fit])
    np.testing.assert_allclose(version.artifact.apply(stored.x), expected.transform(stored.x), atol=1e-5)
    # Cov(x', z) = 0 for the stacked encoding, on the fitting statistics the version stores (Belrose et al. 2023).
    moments, lowrank = version.artifact.moments, version.artifact.map
    cross = moments.cross_covariance
    after = cross - lowrank.u @ (lowrank.v.T @ cross)  # type: ignore[attr-defined]
    assert np.linalg.norm(after) <= 1e-8 * np.linalg.norm(cross)
    card = version.card
    assert card["data"]["fit_rows"] == int(np.count_nonzero(fit))
    entries = {entry["name"]: entry for entry in card["attributes"]}
    assert [(name, entry["kind"]) for name, entry in entries.items()] == [
        ("gender", "categorical"),
        ("age_bracket", "categorical"),
        ("gender&age_bracket", "joint"),
    ]
    assert entries["gender"]["classes"] == ["f", "m", "x"]
    assert len(entries["gender&age_bracket"]["classes"]) == 9
    for entry in entries.values():
        leakage = entry["audit"]["leakage"]
        assert leakage["linear_before"]["accuracy"] > leakage["linear_before"]["majority"] + 0.05
        # No linear probe reads any of them above the majority share on held-out rows any more.
        assert leakage["linear_after"]["accuracy"] < leakage["linear_after"]["majority"] + 0.03
    # The card's verdict is the worst of the attributes', with each reason named.
    levels = ["ok", "warn", "alert"]
    worst = max((entry["verdict"]["status"] for entry in entries.values()), key=levels.index)
    assert card["verdict"]["status"] == worst
    shown = format_card(stored.version, card)
    assert "gender&age_bracket (joint" in shown
    assert "age_bracket (categorical" in shown
    reference = ReferenceStatistics.from_bytes(version.files["reference.npz"])
    assert [attribute.name for attribute in reference.attributes] == list(entries)
    # The report's table names each attribute and the smallest class's share (counted with NumPy).
    page = version.files["report.html"].decode()
    assert "<h2>Attributes</h2>" in page
    share = np.mean(stored.gender[fit] == "x")
    assert f"x: {share:.1%} of rows" in page
    # The evidence document of such a version validates against its schema (the jsonschema library).
    schema = json.loads((Path(__file__).resolve().parents[1] / "docs" / "version-evidence.schema.json").read_text())
    document = json.loads(json.dumps(version_evidence(Registry(stored.registry), NAME, stored.version)))
    jsonschema.Draft202012Validator(schema).validate(document)
    assert [entry["kind"] for entry in document["attributes"]] == ["categorical", "categorical", "joint"]


def test_the_service_takes_a_target_per_attribute(stored: Stored) -> None:
    version = Registry(stored.registry).read_version(NAME, stored.version)
    fit = ~stored.held
    table = attribute_table({"gender": stored.gender, "age_bracket": stored.bracket}, joint=True)
    expected = LEACE().fit(stored.x[fit], table[fit])
    target = {"gender": "x", "age_bracket": "over 50"}
    with TestClient(app_for(stored.registry)) as http, VeilClient(http_client=http) as client:
        moved = client.counterfactual(NAME, stored.x[:40], target)
        np.testing.assert_allclose(moved.vectors, expected.counterfactual(stored.x[:40], target), atol=1e-4)
        assert moved.version == version.id
        # The saturated linear model of the guarded intersection: the moved rows' mean is the fitting rows'
        # mean of that joint class.
        joint = (stored.gender == "x") & (stored.bracket == "over 50")
        shift = moved.vectors - version.artifact.apply(stored.x[:40])
        mean_after = version.artifact.apply(stored.x[fit]).mean(0) + shift[0]
        np.testing.assert_allclose(mean_after, stored.x[fit & joint].mean(0), atol=1e-4)
        answers = [
            http.post(f"/v1/erasers/{NAME}/counterfactual", json={"vectors": stored.x[:2].tolist(), "target": body})
            for body in ("x", {"gender": "x"}, {"gender": "y", "age_bracket": "over 50"})
        ]
    assert [answer.status_code for answer in answers] == [422, 422, 422]
    assert "give a target for each" in answers[0].json()["error"]["message"]
    assert answers[2].json()["error"]["code"] == "unknown_class"


def test_live_checks_give_figures_per_attribute(stored: Stored) -> None:
    rows = stored.held
    with TestClient(app_for(stored.registry)) as http, VeilClient(http_client=http) as client:
        labelled = client.drift(
            NAME,
            stored.x[rows],
            {"gender": stored.gender[rows].tolist(), "age_bracket": stored.bracket[rows].tolist()},
        )
        pseudo = client.drift(NAME, stored.x[rows])
        refused = http.post(
            f"/v1/erasers/{NAME}/drift",
            json={"vectors": stored.x[rows].tolist(), "labels": {"region": ["a"] * int(rows.sum())}},
        )
    figures = labelled["attributes"]
    assert list(figures) == ["gender", "age_bracket", "gender&age_bracket"]
    assert [figures[name]["labels"] for name in figures] == ["labels", "labels", "pseudo-labels"]
    # The held-out rows' class shares are the sample's own (counted with NumPy).
    shares = figures["age_bracket"]["class_shares"]
    assert shares["over 50"] == pytest.approx(np.mean(stored.bracket[rows] == "over 50"))
    assert labelled["class_shares"] == figures["gender"]["class_shares"]
    assert all(entry["labels"] == "pseudo-labels" for entry in pseudo["attributes"].values())
    assert refused.status_code == 422
    assert "'region' is not an attribute" in refused.json()["error"]["message"]


def test_a_fresh_audit_audits_each_attribute(stored: Stored, tmp_path: Path) -> None:
    _people(tmp_path, seed=4, n=600)
    fresh = load_labelled_sample(tmp_path / "people-4.npz", attribute=["gender", "age_bracket"], joint=True)
    result = audit_stored_version(Registry(stored.registry), NAME, "live", fresh, nonlinear=False)
    entries = result.record.body["attributes"]
    assert [entry["name"] for entry in entries] == ["gender", "age_bracket", "gender&age_bracket"]
    # The joint classes' linear probe, as scikit-learn fits it on the cleaned fresh rows, agrees with the record.
    version = Registry(stored.registry).read_version(NAME, "live")
    x, gender, bracket = _people(tmp_path, seed=4, n=600)
    joint = np.char.add(np.char.add(gender, "|"), bracket)
    cleaned = version.artifact.apply(x)
    x_fit, x_held, j_fit, j_held = train_test_split(cleaned, joint, test_size=0.5, random_state=0, stratify=joint)
    accuracy = LogisticRegression(max_iter=2000).fit(x_fit, j_fit).score(x_held, j_held)
    recorded = entries[2]["audit"]["leakage"]["linear_after"]
    assert abs(accuracy - recorded["accuracy"]) < 0.08
    assert accuracy < recorded["majority"] + 0.05
