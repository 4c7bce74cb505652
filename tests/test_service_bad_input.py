"""Every malformed request in the shared table gets its documented 4xx and code in process, never a 5xx."""

from __future__ import annotations

import httpx
import pytest

from reliability.badinput import BODY_LIMIT, CASES, BadRequest, problem_with
from veil.server.errors import ERROR_CODES

from .service_fixtures import ADMIN_TOKEN, ServiceRegistry, app_for, client_for

pytestmark = pytest.mark.anyio


async def send(client: httpx.AsyncClient, case: BadRequest) -> httpx.Response:
    async def pieces():  # type: ignore[no-untyped-def]
        for piece in case.pieces():
            yield piece

    content = pieces() if case.chunked else case.body
    return await client.request(case.method, case.path, content=content, headers=case.headers)


def test_the_table_covers_the_promised_kinds_of_bad_input() -> None:
    assert len(CASES) >= 40
    assert len({case.description for case in CASES}) == len(CASES)
    # Every expected answer is a documented 4xx code with its documented status.
    assert all(ERROR_CODES[case.code][0] == case.status < 500 for case in CASES)
    assert {"body_too_large", "unauthorized", "forbidden", "malformed_body", "invalid_vectors"} <= {
        case.code for case in CASES
    }


@pytest.mark.parametrize("case", CASES, ids=[case.description for case in CASES])
async def test_malformed_requests_get_their_documented_error(
    service_registry: ServiceRegistry, case: BadRequest
) -> None:
    app = app_for(service_registry.path, max_body_bytes=BODY_LIMIT, admin_token=ADMIN_TOKEN)
    async with client_for(app) as client:
        assert problem_with(case, await send(client, case)) is None
        assert (await client.get("/readyz")).status_code == 200
        assert 'status="5' not in (await client.get("/metrics")).text
