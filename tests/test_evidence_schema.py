"""The evidence document of ``veil show --json`` validates against docs/version-evidence.schema.json.

Checked with the ``jsonschema`` library (a general-purpose reference
validator of JSON Schema draft 2020-12), on real output: a version with a
fresh audit and recorded live checks, and the versions an older release
wrote (whose cards predate verdicts).
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path
from typing import Any

import jsonschema
import pytest

from veil.checks.verdict import THREATS
from veil.patrol.rounds import patrol_round
from veil.registry import Registry

from .test_cli import run
from .test_fresh_audit import _population, _save

SCHEMA = json.loads((Path(__file__).resolve().parents[1] / "docs" / "version-evidence.schema.json").read_text())
LEGACY = Path(__file__).parent / "fixtures" / "registry_0_1" / "registry"


def _validate(document: dict[str, Any]) -> None:
    jsonschema.Draft202012Validator.check_schema(SCHEMA)
    jsonschema.Draft202012Validator(SCHEMA).validate(document)


def _evidence(registry: Path, name: str, version: str) -> dict[str, Any]:
    result = run("show", name, version, "--registry", registry, "--json")
    assert result.code == 0, result.err
    document: dict[str, Any] = json.loads(result.out)
    return document


def test_a_version_with_audits_and_checks_gives_a_valid_document(tmp_path: Path) -> None:
    fit, fresh = _save(tmp_path / "fit.npz", *_population(1)), _save(tmp_path / "fresh.npz", *_population(2))
    registry = tmp_path / "registry"
    fitted = run(
        "fit", "--data", fit, "--attribute", "region", "--task", "task", "--method", "leace", "--name", "planted",
        "--registry", registry, "--probes", "linear",
    )  # fmt: skip
    assert fitted.code == 0, fitted.err
    version = fitted.out.strip().splitlines()[-1]
    audited = run("audit", "planted", "1", "--data", fresh, "--attribute", "region", "--registry", registry)
    assert audited.code == 0, audited.err
    for minute, status in enumerate(["ok", "alert"]):
        report = {"version": version, "status": status, "reasons": [], "rows": 400, "mean_shift": 0.0}
        patrol_round(
            Registry(registry), "planted", lambda name, sample, report=report: report,
            service="http://veil", sample=None, every=60.0, now=1_800_000_000.0 + 60 * minute,
        )  # fmt: skip
    document = _evidence(registry, "planted", "1")
    _validate(document)
    assert document["version"] == version
    assert [audit["number"] for audit in document["fresh_audits"]] == [1]
    assert [check["status"] for check in document["live_checks"]] == ["ok", "alert"]
    assert "judged_by_defaults" not in document["verdict"]
    # The threats: the card's claims, the verdict's and the fresh audit's, each threat by name.
    assert document["claims"] == document["verdict"]["claimed"] == document["fresh_audits"][0]["verdict"]["claimed"]
    assert set(document["verdict"]["threats"]) == set(THREATS)
    assert SCHEMA["$defs"]["threat"]["enum"] == list(THREATS)
    with pytest.raises(jsonschema.ValidationError, match="'quadratic' is not one of"):
        _validate({**document, "claims": ["quadratic"]})
    # The schema is not vacuous: the same document with a status veil never writes, or without its checks, fails.
    broken = {**document, "live_checks": [{**document["live_checks"][0], "status": "fine"}]}
    with pytest.raises(jsonschema.ValidationError, match="'fine' is not one of"):
        _validate(broken)
    with pytest.raises(jsonschema.ValidationError, match="'live_checks' is a required property"):
        _validate({key: value for key, value in document.items() if key != "live_checks"})


def test_versions_an_older_release_wrote_give_valid_documents_judged_by_the_defaults(tmp_path: Path) -> None:
    registry = Path(shutil.copytree(LEGACY, tmp_path / "registry"))
    for number in ("1", "2"):
        document = _evidence(registry, "legacy", number)
        _validate(document)
        assert document["verdict"]["judged_by_defaults"] is True
        assert (document["fresh_audits"], document["live_checks"]) == ([], [])
