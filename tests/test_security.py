"""Security properties that hold by construction: no unpickling anywhere, CORS off unless configured."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from .service_fixtures import ServiceRegistry, app_for, client_for

ROOT = Path(__file__).resolve().parent.parent
PACKAGES = [ROOT / "service" / "veil", ROOT / "client" / "veil_client"]
# Loading pickles runs code; nothing in veil may ever do it.
FORBIDDEN = re.compile(
    r"\bimport pickle\b|\bfrom pickle\b|allow_pickle\s*=\s*True|\bpickle\.loads?\(|\bdill\b|joblib\.load"
)


def test_no_module_of_the_packages_can_unpickle() -> None:
    offenders = []
    for package in PACKAGES:
        for path in package.rglob("*.py"):
            for number, line in enumerate(path.read_text(encoding="utf-8").splitlines(), start=1):
                if FORBIDDEN.search(line):
                    offenders.append(f"{path.relative_to(ROOT)}:{number}: {line.strip()}")
    assert offenders == []
    # Every np.load in the packages says allow_pickle=False explicitly.
    for package in PACKAGES:
        for path in package.rglob("*.py"):
            for line in path.read_text(encoding="utf-8").splitlines():
                if "np.load(" in line:
                    assert "allow_pickle=False" in line, f"{path.relative_to(ROOT)}: {line.strip()}"


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
