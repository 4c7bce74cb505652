"""Request and response bodies: JSON (orjson) and binary NumPy ``.npy``.

The ``.npy`` path never goes through Python lists: the header is parsed and
checked strictly (version, 2-D, C order, a float16/32/64 little-endian or
native dtype, a data length that matches the shape exactly) and the data is
viewed in place with ``np.frombuffer``.  Nothing is ever unpickled.
"""

from __future__ import annotations

import ast
import io
from typing import Any

import numpy as np
import orjson
from numpy.typing import NDArray

from veil.server.errors import ServiceError

NPY_MEDIA_TYPE = "application/x-npy"
JSON_MEDIA_TYPE = "application/json"
_MAGIC = b"\x93NUMPY"
_ALLOWED_DTYPES = {"<f2": np.float16, "<f4": np.float32, "<f8": np.float64}
_MAX_HEADER = 4096


def _checked(matrix: NDArray[Any]) -> NDArray[np.floating]:
    if matrix.ndim != 2 or matrix.shape[0] == 0 or matrix.shape[1] == 0:
        raise ServiceError(
            "invalid_vectors", f"expected a non-empty 2-D batch (rows × dimensions), got shape {matrix.shape}"
        )
    if not np.isfinite(matrix).all():
        row = int(np.flatnonzero(~np.isfinite(matrix).all(axis=1))[0])
        raise ServiceError("invalid_vectors", f"row {row} holds NaN or infinite values")
    return matrix


def parse_npy(body: bytes) -> NDArray[np.floating]:
    """A strict reader of one 2-D float ``.npy`` array (format 1.0, 2.0 or 3.0)."""
    if len(body) < 10 or body[:6] != _MAGIC:
        raise ServiceError("malformed_body", "not a .npy array: the magic string is missing")
    major = body[6]
    if major == 1:
        header_length, start = int.from_bytes(body[8:10], "little"), 10
    elif major in (2, 3):
        if len(body) < 12:
            raise ServiceError("malformed_body", "the .npy header is truncated")
        header_length, start = int.from_bytes(body[8:12], "little"), 12
    else:
        raise ServiceError("malformed_body", f"unsupported .npy format version {major}")
    if header_length > _MAX_HEADER or start + header_length > len(body):
        raise ServiceError("malformed_body", "the .npy header is truncated or implausibly long")
    try:
        header = ast.literal_eval(body[start : start + header_length].decode("latin1"))
    except (ValueError, SyntaxError, MemoryError, RecursionError):
        raise ServiceError("malformed_body", "the .npy header is not a valid dictionary") from None
    if not isinstance(header, dict) or set(header) != {"descr", "fortran_order", "shape"}:
        raise ServiceError("malformed_body", "the .npy header must hold exactly descr, fortran_order and shape")
    descr, fortran, shape = header["descr"], header["fortran_order"], header["shape"]
    dtype = _ALLOWED_DTYPES.get(descr.replace("=", "<").replace("|", "<") if isinstance(descr, str) else "")
    if dtype is None:
        raise ServiceError(
            "invalid_vectors", f"the .npy dtype must be little-endian float16, float32 or float64, got {descr!r}"
        )
    if fortran is not False:
        raise ServiceError("malformed_body", "the .npy array must be in C order")
    if not (isinstance(shape, tuple) and len(shape) == 2 and all(isinstance(s, int) and s >= 0 for s in shape)):
        raise ServiceError("invalid_vectors", f"the .npy array must be 2-D, got shape {shape!r}")
    data_start = start + header_length
    expected = shape[0] * shape[1] * np.dtype(dtype).itemsize
    if len(body) - data_start != expected:
        raise ServiceError(
            "malformed_body", f"the .npy data holds {len(body) - data_start} bytes but shape {shape} needs {expected}"
        )
    matrix = np.frombuffer(body, dtype=dtype, offset=data_start).reshape(shape)
    if dtype is np.float16:
        matrix = matrix.astype(np.float32)
    return _checked(matrix)


def parse_json_vectors(value: Any, *, field: str = "vectors") -> NDArray[np.floating]:
    """``[[...], ...]`` as a float32 matrix; refuses ragged rows, non-numbers, booleans and empties."""
    if not isinstance(value, list) or not value:
        raise ServiceError("invalid_vectors", f"{field!r} must be a non-empty list of rows")
    width = len(value[0]) if isinstance(value[0], list) else -1
    for index, row in enumerate(value):
        if not isinstance(row, list):
            raise ServiceError("invalid_vectors", f"{field}[{index}] is not a list of numbers")
        if len(row) != width:
            raise ServiceError(
                "invalid_vectors", f"ragged rows: {field}[0] has {width} values, {field}[{index}] has {len(row)}"
            )
        for column, number in enumerate(row):
            # Exact type checks: numpy would quietly turn "1.5" and true into numbers.
            if number.__class__ is not float and number.__class__ is not int:
                raise ServiceError(
                    "invalid_vectors", f"{field}[{index}][{column}] is {type(number).__name__}, not a number"
                )
    try:
        matrix = np.array(value, dtype=np.float64)
    except OverflowError:
        raise ServiceError("invalid_vectors", f"{field!r} holds an integer too large for a float") from None
    if np.abs(matrix).max(initial=0.0) > np.finfo(np.float32).max:
        raise ServiceError("invalid_vectors", f"{field!r} holds values beyond the float32 range")
    return _checked(matrix).astype(np.float32)


def load_json(body: bytes) -> Any:
    try:
        return orjson.loads(body)
    except orjson.JSONDecodeError as error:
        raise ServiceError("malformed_body", f"the body is not valid JSON: {error}") from None


def npy_bytes(matrix: NDArray[np.floating]) -> bytes:
    buffer = io.BytesIO()
    np.save(buffer, np.ascontiguousarray(matrix), allow_pickle=False)
    return buffer.getvalue()


def json_bytes(content: dict[str, Any]) -> bytes:
    return orjson.dumps(content, option=orjson.OPT_SERIALIZE_NUMPY)
