"""Security properties that hold by construction: no unpickling anywhere, CORS off unless configured."""

from __future__ import annotations

from pathlib import Path

import pytest

from reliability.security import unpickling_lines

from .service_fixtures import ServiceRegistry, app_for, client_for


def test_no_module_of_the_packages_can_unpickle(tmp_path: Path) -> None:
    assert unpickling_lines() == []
    # The check itself finds what it looks for.
    (tmp_path / "bad.py").write_text("import numpy as np\nx = np.load('f.npy')\nimport pickle\n")
    assert len(unpickling_lines([tmp_path])) == 2


@pytest.mark.anyio
async def test_cors_is_off_unless_origins_are_configured(service_registry: ServiceRegistry) -> None:
    preflight = {"Origin": "https://search.example", "Access-Control-Request-Method": "POST"}
    async with client_for(app_for(service_registry.path)) as client:
        response = await client.options("/v1/erasers/planted/apply", headers=preflight)
        assert "access-control-allow-origin" not in response.headers
        plain = await client.get("/healthz", headers={"Origin": "https://search.example"})
        assert "access-control-allow-origin" not in plain.headers
    async with client_for(app_for(service_registry.path, cors_origins=["https://search.example"])) as client:
        response = await client.options("/v1/erasers/planted/apply", headers=preflight)
        assert response.headers["access-control-allow-origin"] == "https://search.example"
        other = await client.options(
            "/v1/erasers/planted/apply", headers={**preflight, "Origin": "https://elsewhere.example"}
        )
        assert "access-control-allow-origin" not in other.headers
