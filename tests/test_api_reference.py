"""docs/api.md is what scripts/write_api_reference.py writes from the current app."""

from __future__ import annotations

from pathlib import Path

from veil.server.apireference import render_api_reference

API_REFERENCE = Path(__file__).resolve().parent.parent / "docs" / "api.md"


def test_the_api_reference_is_current() -> None:
    assert API_REFERENCE.read_text(encoding="utf-8") == render_api_reference(), (
        "docs/api.md is out of date: run .venv/bin/python scripts/write_api_reference.py"
    )


def test_the_reference_covers_every_route_and_error_code() -> None:
    text = render_api_reference()
    for route in (
        "POST /v1/erasers/{name}/apply",
        "GET /v1/erasers/{name}/drift",
        "GET /readyz",
        "POST /v1/admin/reload",
    ):
        assert f"## `{route}`" in text
    assert "`wrong_dimension`" in text
