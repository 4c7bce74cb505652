"""Every malformed request gets its documented 4xx and error code, never a 5xx, and the service stays healthy."""

from __future__ import annotations

import io
import pickle
import struct

import numpy as np
import orjson
import pytest

from .service_fixtures import PLANTED, ServiceRegistry, app_for, client_for

pytestmark = pytest.mark.anyio
NPY = {"Content-Type": "application/x-npy"}
JSON = {"Content-Type": "application/json"}
APPLY = f"/v1/erasers/{PLANTED}/apply"
D = 16  # the planted eraser's dimension


def npy(matrix: np.ndarray) -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, matrix, allow_pickle=True)
    return buffer.getvalue()


def npy_with_header(header: str, data: bytes = b"", *, version: int = 1) -> bytes:
    """A hand-built .npy file: the forger's tool (numpy's format, written by hand)."""
    text = header.encode("latin1")
    if version == 1:
        return b"\x93NUMPY\x01\x00" + struct.pack("<H", len(text)) + text + data
    return b"\x93NUMPY" + bytes([version, 0]) + struct.pack("<I", len(text)) + text + data


GOOD = np.ones((2, D), dtype=np.float32)
HEADER = "{'descr': '<f4', 'fortran_order': False, 'shape': (2, 16), }"
FORGED_SHAPE = npy_with_header(HEADER.replace("(2, 16)", "(9, 16)"), GOOD.tobytes())
CODE_IN_HEADER = npy_with_header("__import__('os').system('true')", GOOD.tobytes())
EXTRA_KEY = npy_with_header(HEADER.replace(" }", " 'x': 1}"), GOOD.tobytes())
HUGE_HEADER_LENGTH = npy_with_header(HEADER, version=2)[:8] + struct.pack("<I", 1 << 30)
BEYOND_FLOAT32 = b'{"vectors": [[' + b",".join([b"1e300"] * D) + b"]]}"
DRIFT = f"/v1/erasers/{PLANTED}/drift"
COUNTERFACTUAL = f"/v1/erasers/{PLANTED}/counterfactual"


def drift_body(labels: object) -> bytes:
    return orjson.dumps({"vectors": np.ones((30, D)).tolist(), "labels": labels})


# (description, path, headers, body, status, code)
CASES: list[tuple[str, str, dict[str, str], bytes, int, str]] = [
    ("wrong dimension, JSON", APPLY, JSON, b'{"vectors": [[1.0, 2.0]]}', 422, "wrong_dimension"),
    ("wrong dimension, npy", APPLY, NPY, npy(np.ones((3, 5), dtype=np.float32)), 422, "wrong_dimension"),
    ("NaN in npy", APPLY, NPY, npy(np.full((2, D), np.nan, dtype=np.float32)), 422, "invalid_vectors"),
    ("Inf in npy", APPLY, NPY, npy(np.full((2, D), np.inf)), 422, "invalid_vectors"),
    ("NaN literal in JSON", APPLY, JSON, b'{"vectors": [[NaN]]}', 400, "malformed_body"),
    ("huge number in JSON", APPLY, JSON, b'{"vectors": [[1e400]]}', 400, "malformed_body"),
    ("beyond float32 in JSON", APPLY, JSON, BEYOND_FLOAT32, 422, "invalid_vectors"),
    ("huge integer in JSON", APPLY, JSON, b'{"vectors": [[' + b"9" * 400 + b"]]}", 400, "malformed_body"),
    ("empty batch", APPLY, JSON, b'{"vectors": []}', 422, "invalid_vectors"),
    ("empty rows", APPLY, JSON, b'{"vectors": [[], []]}', 422, "invalid_vectors"),
    ("empty npy batch", APPLY, NPY, npy(np.ones((0, D), dtype=np.float32)), 422, "invalid_vectors"),
    ("ragged rows", APPLY, JSON, b'{"vectors": [[1, 2], [1, 2, 3]]}', 422, "invalid_vectors"),
    ("strings", APPLY, JSON, b'{"vectors": [["1.5", "2"]]}', 422, "invalid_vectors"),
    ("booleans", APPLY, JSON, b'{"vectors": [[true, false]]}', 422, "invalid_vectors"),
    ("nulls", APPLY, JSON, b'{"vectors": [[null, 1]]}', 422, "invalid_vectors"),
    ("objects in rows", APPLY, JSON, b'{"vectors": [[{"a": 1}]]}', 422, "invalid_vectors"),
    ("a flat list", APPLY, JSON, b'{"vectors": [1, 2, 3]}', 422, "invalid_vectors"),
    ("vectors not a list", APPLY, JSON, b'{"vectors": "abc"}', 422, "invalid_vectors"),
    ("three levels of nesting", APPLY, JSON, b'{"vectors": [[[1.0]]]}', 422, "invalid_vectors"),
    ("no vectors field", APPLY, JSON, b'{"rows": [[1]]}', 422, "invalid_request"),
    ("a JSON list body", APPLY, JSON, b"[[1, 2]]", 422, "invalid_request"),
    ("not JSON", APPLY, JSON, b"vectors=1,2", 400, "malformed_body"),
    ("empty JSON body", APPLY, JSON, b"", 400, "malformed_body"),
    ("bad UTF-8", APPLY, JSON, b'{"vectors": "\xff\xfe"}', 400, "malformed_body"),
    ("deep JSON nesting", APPLY, JSON, b"[" * 5000 + b"]" * 5000, 400, "malformed_body"),
    ("npy without magic", APPLY, NPY, b"PK\x03\x04 not an array", 400, "malformed_body"),
    ("npy truncated header", APPLY, NPY, npy(GOOD)[:20], 400, "malformed_body"),
    ("npy truncated data", APPLY, NPY, npy(GOOD)[:-4], 400, "malformed_body"),
    ("npy extra data", APPLY, NPY, npy(GOOD) + b"\x00" * 4, 400, "malformed_body"),
    ("npy forged shape", APPLY, NPY, FORGED_SHAPE, 400, "malformed_body"),
    ("npy header with code", APPLY, NPY, CODE_IN_HEADER, 400, "malformed_body"),
    ("npy header with extra key", APPLY, NPY, EXTRA_KEY, 400, "malformed_body"),
    ("npy version 9", APPLY, NPY, b"\x93NUMPY\x09\x00" + b"\x00" * 20, 400, "malformed_body"),
    ("npy huge header length", APPLY, NPY, HUGE_HEADER_LENGTH, 400, "malformed_body"),
    ("pickled object array", APPLY, NPY, npy(np.array([[object()]], dtype=object)), 422, "invalid_vectors"),
    ("raw pickle", APPLY, NPY, pickle.dumps({"vectors": [[1.0]]}), 400, "malformed_body"),
    ("integer npy", APPLY, NPY, npy(np.ones((2, D), dtype=np.int64)), 422, "invalid_vectors"),
    ("big-endian npy", APPLY, NPY, npy(np.ones((2, D), dtype=">f4")), 422, "invalid_vectors"),
    ("complex npy", APPLY, NPY, npy(np.ones((2, D), dtype=np.complex64)), 422, "invalid_vectors"),
    ("3-D npy", APPLY, NPY, npy(np.ones((2, 2, D), dtype=np.float32)), 422, "invalid_vectors"),
    ("1-D npy", APPLY, NPY, npy(np.ones(D, dtype=np.float32)), 422, "invalid_vectors"),
    ("Fortran-order npy", APPLY, NPY, npy(np.asfortranarray(np.ones((3, D), dtype=np.float32))), 400, "malformed_body"),
    ("unsupported media type", APPLY, {"Content-Type": "text/plain"}, b"1,2,3", 415, "unsupported_media_type"),
    ("no content type", APPLY, {}, npy(GOOD), 415, "unsupported_media_type"),
    ("unacceptable Accept", APPLY, {**NPY, "Accept": "text/html"}, npy(GOOD), 406, "not_acceptable"),
    ("unknown eraser", "/v1/erasers/nobody/apply", NPY, npy(GOOD), 404, "unknown_eraser"),
    ("path-traversal eraser", "/v1/erasers/..%2F..%2Fetc/apply", NPY, npy(GOOD), 404, "not_found"),
    ("unknown version", APPLY + "?version=99", NPY, npy(GOOD), 404, "unknown_version"),
    ("path-traversal version", APPLY + "?version=../x", NPY, npy(GOOD), 404, "unknown_version"),
    ("unknown alias", APPLY + "?alias=nightly", NPY, npy(GOOD), 404, "unknown_version"),
    ("version and alias both", APPLY + "?alias=live&version=1", NPY, npy(GOOD), 422, "invalid_request"),
    ("unknown route", "/v1/nothing", NPY, npy(GOOD), 404, "not_found"),
    ("unknown counterfactual class", COUNTERFACTUAL + "?target=east", NPY, npy(GOOD), 422, "unknown_class"),
    ("counterfactual without target", COUNTERFACTUAL, NPY, npy(GOOD), 422, "invalid_request"),
    ("drift with too few rows", DRIFT, NPY, npy(GOOD), 422, "invalid_request"),
    ("drift with unknown labels", DRIFT, JSON, drift_body(["west"] * 30), 422, "invalid_request"),
    ("drift with labels of the wrong length", DRIFT, JSON, drift_body(["north"]), 422, "invalid_request"),
    ("drift with numeric labels", DRIFT, JSON, drift_body([1, 2]), 422, "invalid_request"),
]  # fmt: skip


@pytest.mark.parametrize(("description", "path", "headers", "body", "status", "code"), CASES, ids=[c[0] for c in CASES])
async def test_malformed_requests_get_their_documented_error(
    service_registry: ServiceRegistry,
    description: str,
    path: str,
    headers: dict[str, str],
    body: bytes,
    status: int,
    code: str,
) -> None:
    async with client_for(app_for(service_registry.path)) as client:
        response = await client.post(path, content=body, headers=headers)
        assert (response.status_code, response.json()["error"]["code"]) == (status, code), response.text
        assert response.json()["error"]["message"]
        assert (await client.get("/readyz")).status_code == 200


async def test_wrong_methods_no_traffic_and_oversized_bodies(service_registry: ServiceRegistry) -> None:
    async with client_for(app_for(service_registry.path, max_body_bytes=1024)) as client:
        wrong = await client.get(APPLY)
        assert (wrong.status_code, wrong.json()["error"]["code"]) == (405, "method_not_allowed")
        quiet = await client.get(f"/v1/erasers/{PLANTED}/drift")
        assert (quiet.status_code, quiet.json()["error"]["code"]) == (409, "no_traffic")
        big = await client.post(APPLY, content=npy(np.ones((100, D), dtype=np.float32)), headers=NPY)
        assert (big.status_code, big.json()["error"]["code"]) == (413, "body_too_large")

        async def chunks():  # no Content-Length: the limit must hold while streaming
            for _ in range(10):
                yield b"\x00" * 512

        streamed = await client.post(APPLY, content=chunks(), headers=NPY)
        assert (streamed.status_code, streamed.json()["error"]["code"]) == (413, "body_too_large")
        assert (await client.get("/healthz")).status_code == 200
        metrics = (await client.get("/metrics")).text
        assert 'status="5' not in metrics
