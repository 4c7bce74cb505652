"""A table of malformed requests, each with its documented status and error code, and a runner for a live server.

The same table runs in process (``tests/test_service_bad_input.py``) and
against a real uvicorn (``make reliability``).  Servers checked with it are
configured with ``max_body_bytes=BODY_LIMIT`` so oversized bodies stay small.
"""

from __future__ import annotations

import io
import pickle
import struct
from collections.abc import Iterator
from dataclasses import dataclass

import httpx
import numpy as np
import orjson

from reliability.outcome import Outcome
from reliability.workbench import ADMIN_TOKEN, PLANTED, PLANTED_DIM

NPY = {"Content-Type": "application/x-npy"}
JSON = {"Content-Type": "application/json"}
APPLY = f"/v1/erasers/{PLANTED}/apply"
D = PLANTED_DIM
BODY_LIMIT = 4 << 20


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
# numpy itself writes only True or False; a 1 here is a forgery, and truthiness must not let it through.
FORTRAN_AS_NUMBER = npy_with_header(HEADER.replace("False", "1"), GOOD.tobytes())
EXTRA_KEY = npy_with_header(HEADER.replace(" }", " 'x': 1}"), GOOD.tobytes())
HUGE_HEADER_LENGTH = npy_with_header(HEADER, version=2)[:8] + struct.pack("<I", 1 << 30)
BEYOND_FLOAT32 = b'{"vectors": [[' + b",".join([b"1e300"] * D) + b"]]}"
DRIFT = f"/v1/erasers/{PLANTED}/drift"
COUNTERFACTUAL = f"/v1/erasers/{PLANTED}/counterfactual"


def drift_body(labels: object) -> bytes:
    return orjson.dumps({"vectors": np.ones((30, D)).tolist(), "labels": labels})


# (description, path, headers, body, status, code): POSTs whose whole body is sent at once.
_POSTS: list[tuple[str, str, dict[str, str], bytes, int, str]] = [
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
    ("big-endian integer npy", APPLY, NPY, npy(np.ones((2, D), dtype=">i4")), 422, "invalid_vectors"),
    ("big-endian complex npy", APPLY, NPY, npy(np.ones((2, D), dtype=">c8")), 422, "invalid_vectors"),
    ("big-endian npy truncated data", APPLY, NPY, npy(np.ones((2, D), dtype=">f4"))[:-4], 400, "malformed_body"),
    ("big-endian NaN in npy", APPLY, NPY, npy(np.full((2, D), np.nan, dtype=">f8")), 422, "invalid_vectors"),
    ("complex npy", APPLY, NPY, npy(np.ones((2, D), dtype=np.complex64)), 422, "invalid_vectors"),
    ("3-D npy", APPLY, NPY, npy(np.ones((2, 2, D), dtype=np.float32)), 422, "invalid_vectors"),
    ("1-D npy", APPLY, NPY, npy(np.ones(D, dtype=np.float32)), 422, "invalid_vectors"),
    ("Fortran-order npy, wrong dimension", APPLY, NPY, npy(np.asfortranarray(np.ones((3, 5), dtype=np.float32))), 422,
     "wrong_dimension"),
    ("Fortran-order 3-D npy", APPLY, NPY, npy(np.asfortranarray(np.ones((2, 3, D), dtype=np.float32))), 422,
     "invalid_vectors"),
    ("Fortran-order object npy", APPLY, NPY, npy(np.asfortranarray(np.full((2, D), None, dtype=object))), 422,
     "invalid_vectors"),
    ("npy fortran_order not a boolean", APPLY, NPY, FORTRAN_AS_NUMBER, 400, "malformed_body"),
    ("unsupported media type", APPLY, {"Content-Type": "text/plain"}, b"1,2,3", 415, "unsupported_media_type"),
    ("no content type", APPLY, {}, npy(GOOD), 415, "unsupported_media_type"),
    ("unacceptable Accept", APPLY, {**NPY, "Accept": "text/html"}, npy(GOOD), 406, "not_acceptable"),
    ("unknown eraser", "/v1/erasers/nobody/apply", NPY, npy(GOOD), 404, "unknown_eraser"),
    ("path-traversal eraser", "/v1/erasers/..%2F..%2Fetc/apply", NPY, npy(GOOD), 404, "not_found"),
    ("unknown version", APPLY + "?version=99", NPY, npy(GOOD), 404, "unknown_version"),
    ("path-traversal version", APPLY + "?version=../x", NPY, npy(GOOD), 404, "unknown_version"),
    ("unknown alias", APPLY + "?alias=nightly", NPY, npy(GOOD), 404, "unknown_version"),
    ("version and alias both", APPLY + "?alias=live&version=1", NPY, npy(GOOD), 422, "invalid_request"),
    ("embedding model with a space", APPLY, {**NPY, "X-Veil-Embedding-Model": "acme encoder"}, npy(GOOD), 422,
     "invalid_request"),
    ("embedding model with nothing after @", DRIFT, {**JSON, "X-Veil-Embedding-Model": "acme@"},
     drift_body(["north"] * 30), 422, "invalid_request"),
    ("unknown route", "/v1/nothing", NPY, npy(GOOD), 404, "not_found"),
    ("unknown counterfactual class", COUNTERFACTUAL + "?target=east", NPY, npy(GOOD), 422, "unknown_class"),
    ("counterfactual without target", COUNTERFACTUAL, NPY, npy(GOOD), 422, "invalid_request"),
    ("drift with too few rows", DRIFT, NPY, npy(GOOD), 422, "invalid_request"),
    ("drift with unknown labels", DRIFT, JSON, drift_body(["west"] * 30), 422, "invalid_request"),
    ("drift with labels of the wrong length", DRIFT, JSON, drift_body(["north"]), 422, "invalid_request"),
    ("drift with numeric labels", DRIFT, JSON, drift_body([1, 2]), 422, "invalid_request"),
]  # fmt: skip


@dataclass(frozen=True)
class BadRequest:
    """One malformed request and the answer the docs promise for it."""

    description: str
    method: str
    path: str
    headers: dict[str, str]
    body: bytes
    status: int
    code: str
    #: Send the body in pieces without a Content-Length (the size limit must hold while streaming).
    chunked: bool = False

    def pieces(self) -> Iterator[bytes]:
        for start in range(0, len(self.body), 64 << 10):
            yield self.body[start : start + (64 << 10)]


OVERSIZED = npy(np.ones((BODY_LIMIT // (4 * D) + 16, D), dtype=np.float32))
ADMIN = "/v1/admin/reload"

CASES: list[BadRequest] = [
    *(BadRequest(description, "POST", path, headers, body, status, code)
      for description, path, headers, body, status, code in _POSTS),
    BadRequest("GET on a POST route", "GET", APPLY, {}, b"", 405, "method_not_allowed"),
    BadRequest("traffic drift before any traffic", "GET", DRIFT, {}, b"", 409, "no_traffic"),
    BadRequest("oversized body", "POST", APPLY, NPY, OVERSIZED, 413, "body_too_large"),
    BadRequest("oversized body, streamed", "POST", APPLY, NPY, OVERSIZED, 413, "body_too_large", chunked=True),
    BadRequest("admin without a token", "POST", ADMIN, {}, b"", 401, "unauthorized"),
    BadRequest("admin with a wrong token", "POST", ADMIN, {"Authorization": "Bearer guess"}, b"", 403, "forbidden"),
    BadRequest("admin with another scheme", "POST", ADMIN, {"Authorization": f"Basic {ADMIN_TOKEN}"}, b"", 403,
               "forbidden"),
    BadRequest("path-traversal alias", "POST", APPLY + "?alias=../../x", NPY, npy(GOOD), 404, "unknown_version"),
    BadRequest("NUL in the eraser name", "POST", "/v1/erasers/a%00b/apply", NPY, npy(GOOD), 404, "unknown_eraser"),
    BadRequest("unknown eraser's card", "GET", "/v1/erasers/nobody", {}, b"", 404, "unknown_eraser"),
]  # fmt: skip


def problem_with(case: BadRequest, response: httpx.Response) -> str | None:
    """Why ``response`` is not the documented answer to ``case`` (None if it is)."""
    try:
        error = response.json()["error"]
        got = (response.status_code, error["code"])
        message = error["message"]
    except (ValueError, KeyError, TypeError):
        return f"{case.description}: {response.status_code} without an error body"
    if got != (case.status, case.code):
        return f"{case.description}: {got}, expected {(case.status, case.code)}: {message}"
    return None if message else f"{case.description}: an empty message"


def send(client: httpx.Client, case: BadRequest) -> httpx.Response:
    content = case.pieces() if case.chunked else case.body
    return client.request(case.method, case.path, content=content, headers=case.headers)


def bad_input_against(base_url: str) -> Outcome:
    """Send every case to a live server; each must get its status and code, the server staying healthy."""
    problems = []
    with httpx.Client(base_url=base_url, timeout=30.0) as client:
        for case in CASES:
            problem = problem_with(case, send(client, case))
            if problem is not None:
                problems.append(problem)
            if client.get("/healthz").status_code != 200:
                problems.append(f"unhealthy after {case.description}")
        metrics = client.get("/metrics").text
    server_errors = metrics.count('status="5')
    if server_errors:
        problems.append(f"/metrics counts {server_errors} series of 5xx answers")
    statuses = sorted({case.status for case in CASES})
    figures = (
        f"{len(CASES)} malformed requests ({len(CASES) - len(problems)} answered as documented; "
        f"statuses {', '.join(map(str, statuses))}), no 5xx, healthy after each"
    )
    return Outcome("bad input: malformed requests", not problems, figures, problems)
