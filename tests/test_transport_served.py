"""Class-conditional transport served like every other version: fitted, stored, read back, applied, checked."""

from __future__ import annotations

import io
from pathlib import Path

import numpy as np
import pytest
from sklearn.linear_model import LogisticRegression

from veil.erasers.transport import GaussianTransport
from veil.fitting.job import fit_version
from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, StoreSpec
from veil.registry import Registry
from veil.registry.artifact_files import decode_artifact, encode_artifact
from veil.samples.harbourline import load_harbourline_profiles
from veil.samples.splitting import holdout_mask

from .service_fixtures import app_for, client_for, sample_of
from .test_cli import run
from .tolerances import apply_bound, assert_same_answer, counterfactual_bound

NAME = "profiles-transport"


@pytest.fixture(scope="module")
def stored(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str]:
    path = tmp_path_factory.mktemp("transport") / "registry"
    profiles = load_harbourline_profiles()
    outcome = fit_version(
        sample_of(profiles.embedding, profiles.pronoun, "pronoun"),
        FitRequest(
            MethodSpec("transport", params={"rank": 64}),
            StoreSpec(NAME, alias="live"),
            audit=AuditSpec(nonlinear=False),
        ),
        registry=Registry(path),
    )
    return path, outcome.version_id


def test_the_stored_version_is_the_estimator_fitted_on_the_non_held_out_rows(stored: tuple[Path, str]) -> None:
    path, version = stored
    profiles = load_harbourline_profiles()
    fit = ~holdout_mask(profiles.pronoun.size, fraction=0.2, seed=0)
    expected = GaussianTransport(rank=64, random_state=0).fit(profiles.embedding[fit], profiles.pronoun[fit])
    artifact = Registry(path).read_version(NAME, version).artifact
    assert artifact.kind == "class-transport"
    np.testing.assert_allclose(artifact.apply(profiles.embedding), expected.transform(profiles.embedding), atol=1e-5)
    # The artifact files hold it exactly: bytes in, the same map out.
    again = decode_artifact(encode_artifact(artifact))
    np.testing.assert_array_equal(again.apply(profiles.embedding), artifact.apply(profiles.embedding))


def test_the_card_names_the_kind_and_says_the_map_reads_the_attribute(stored: tuple[Path, str]) -> None:
    path, version = stored
    card = Registry(path).read_version(NAME, version).card
    assert card["map_kind"] == "class-transport"
    assert card["class_maps"] == 2
    assert "reads the attribute in order to remove it" in card["notes"][0]
    shown = run("show", NAME, version, "--registry", path)
    assert shown.code == 0
    assert "class-transport map, not affine" in shown.out


@pytest.mark.anyio
async def test_the_service_applies_and_counterfacts_like_the_artifact(stored: tuple[Path, str]) -> None:
    path, version = stored
    artifact = Registry(path).read_version(NAME, version).artifact
    profiles = load_harbourline_profiles()
    x = profiles.embedding[:256]
    async with client_for(app_for(path, names=[NAME])) as client:
        body = io.BytesIO()
        np.save(body, x)
        applied = await client.post(
            f"/v1/erasers/{NAME}/apply", content=body.getvalue(), headers={"Content-Type": "application/x-npy"}
        )
        assert applied.status_code == 200
        assert applied.headers["x-veil-version"] == version
        # The service's single BLAS thread sums in another order than this process: equal to the float32
        # round-off bound (tests/tolerances.py, which also refuses rows whose inferred class round-off could flip).
        assert_same_answer(np.load(io.BytesIO(applied.content)), artifact.apply(x), apply_bound(artifact, x), "apply")
        moved = await client.post(f"/v1/erasers/{NAME}/counterfactual", json={"vectors": x.tolist(), "target": "she"})
        assert moved.status_code == 200
        served = np.array(moved.json()["vectors"], dtype=np.float32)  # each float32's shortest decimal, read back
        bound = counterfactual_bound(artifact, x, artifact.map.class_means[1])  # type: ignore[attr-defined]
        assert_same_answer(served, artifact.counterfactual(x, 1), bound, "counterfactual")
        # Live checks take the transport map like any other: the fitting population is normal traffic.
        checked = await client.post(
            f"/v1/erasers/{NAME}/drift",
            json={"vectors": profiles.embedding[:600].tolist(), "labels": profiles.pronoun[:600].tolist()},
        )
        assert checked.status_code == 200
        assert checked.json()["status"] == "ok", checked.json()


def test_counterfactual_rows_carry_the_target_class(stored: tuple[Path, str]) -> None:
    path, version = stored
    artifact = Registry(path).read_version(NAME, version).artifact
    profiles = load_harbourline_profiles()
    x = profiles.embedding[profiles.pronoun == "he"]
    # Reference: scikit-learn's logistic regression, trained on the raw sample, reads the target class back.
    reader = LogisticRegression(max_iter=2000).fit(profiles.embedding, profiles.pronoun)
    assert np.mean(reader.predict(artifact.counterfactual(x, 1)) == "she") > 0.9


def test_veil_apply_cleans_a_corpus_with_the_transport_version(stored: tuple[Path, str], tmp_path: Path) -> None:
    path, version = stored
    x = load_harbourline_profiles().embedding[:300]
    np.save(tmp_path / "corpus.npy", x)
    result = run("apply", NAME, "--registry", path, "--in", tmp_path / "corpus.npy", "--out", tmp_path / "clean.npy")
    assert result.code == 0, result.err
    artifact = Registry(path).read_version(NAME, version).artifact
    # `veil apply` cleans in chunks; the float32 round-off bound covers any chunking and thread count.
    assert_same_answer(np.load(tmp_path / "clean.npy"), artifact.apply(x), apply_bound(artifact, x), "veil apply")


@pytest.mark.anyio
async def test_search_vectors_of_a_transport_map_are_marked_inexact_and_refused_when_exact_is_asked(
    stored: tuple[Path, str],
) -> None:
    path, version = stored
    x = load_harbourline_profiles().embedding[:8]
    route = f"/v1/erasers/{NAME}/search-vector"
    async with client_for(app_for(path, names=[NAME])) as client:
        refused = await client.post(f"{route}?exact=true", json={"vectors": x.tolist()})
        assert (refused.status_code, refused.json()["error"]["code"]) == (422, "inexact_search")
        assert "class-transport map is not affine" in refused.json()["error"]["message"]
        answered = await client.post(route, json={"vectors": x.tolist()})
        assert (answered.status_code, answered.headers["x-veil-search-exact"]) == (200, "false")
        assert answered.headers["x-veil-version"] == version
        assert answered.json()["offsets"] is None
        assert "not affine" in answered.json()["note"]
