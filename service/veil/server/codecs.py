"""Request and response bodies: JSON (orjson) and binary NumPy ``.npy``.

The ``.npy`` path never goes through Python lists: the header is parsed and
checked strictly (version, exactly the three keys, 2-D, ``fortran_order`` a
boolean, a float16/32/64 dtype of either byte order, a data length that
matches the shape exactly) and the data is viewed in place with
``np.frombuffer``.  A C-order float32 or float64 batch in the machine's byte
order (little-endian, what clients send) is used as that view, with no copy;
Fortran order, the other byte order and float16 cost one copy into a C-order
native array.  Nothing is ever unpickled.
"""

from __future__ import annotations

import ast
import functools
import io
from typing import Any

import numpy as np
import orjson
from numpy.typing import NDArray

from veil.server.errors import ServiceError

NPY_MEDIA_TYPE = "application/x-npy"
JSON_MEDIA_TYPE = "application/json"
_MAGIC = b"\x93NUMPY"
#: The float widths accepted, and the native dtype each is served as (float16 is widened: the maps are float32).
_SERVED_AS: dict[str, np.dtype[Any]] = {
    "f2": np.dtype(np.float32),
    "f4": np.dtype(np.float32),
    "f8": np.dtype(np.float64),
}
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


def _float_dtype(descr: object) -> tuple[np.dtype[Any], np.dtype[Any]]:
    """The dtype of the data as sent, and the native dtype it is served as; refuses every non-float descr."""
    if isinstance(descr, str) and len(descr) == 3 and descr[0] in "<>=|" and descr[1:] in _SERVED_AS:
        # "|" (no byte order) is not what numpy writes for floats, but it has always been read as native here.
        return np.dtype(descr.replace("|", "=")), _SERVED_AS[descr[1:]]
    raise ServiceError("invalid_vectors", f"the .npy dtype must be float16, float32 or float64, got {descr!r}")


@functools.lru_cache(maxsize=256)
def _header(text: bytes) -> tuple[np.dtype[Any], np.dtype[Any], bool, tuple[int, int]]:
    """The dtype sent, the dtype served, the order and the shape a ``.npy`` header declares, checked strictly.

    Cached by the header's bytes: callers send the same few shapes again and
    again, and evaluating the dictionary costs more than erasing one vector.
    A header that fails a check raises each time (exceptions are not cached).
    """
    try:
        header = ast.literal_eval(text.decode("latin1"))
    except (ValueError, SyntaxError, MemoryError, RecursionError):
        raise ServiceError("malformed_body", "the .npy header is not a valid dictionary") from None
    if not isinstance(header, dict) or set(header) != {"descr", "fortran_order", "shape"}:
        raise ServiceError("malformed_body", "the .npy header must hold exactly descr, fortran_order and shape")
    descr, fortran, shape = header["descr"], header["fortran_order"], header["shape"]
    wire, served = _float_dtype(descr)
    if not isinstance(fortran, bool):
        raise ServiceError("malformed_body", f"the .npy fortran_order must be True or False, got {fortran!r}")
    if not (isinstance(shape, tuple) and len(shape) == 2 and all(isinstance(s, int) and s >= 0 for s in shape)):
        raise ServiceError("invalid_vectors", f"the .npy array must be 2-D, got shape {shape!r}")
    return wire, served, fortran, shape


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
    wire, served, fortran, shape = _header(body[start : start + header_length])
    data_start = start + header_length
    expected = shape[0] * shape[1] * wire.itemsize
    if len(body) - data_start != expected:
        raise ServiceError(
            "malformed_body", f"the .npy data holds {len(body) - data_start} bytes but shape {shape} needs {expected}"
        )
    flat = np.frombuffer(body, dtype=wire, offset=data_start)
    # Fortran order stores the transpose's rows: viewed as such, then transposed (still a view).
    matrix = flat.reshape(shape[::-1]).T if fortran else flat.reshape(shape)
    if matrix.dtype != served or fortran:
        # One copy that fixes order, byte order and width together; the common case above skips it.
        matrix = np.array(matrix, dtype=served, order="C")
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


@functools.lru_cache(maxsize=256)
def _npy_header(descr: str, shape: tuple[int, ...]) -> bytes:
    """The ``.npy`` header numpy writes for a C-order array of this dtype and shape (format 1.0)."""
    buffer = io.BytesIO()
    np.lib.format.write_array_header_1_0(buffer, {"descr": descr, "fortran_order": False, "shape": shape})
    return buffer.getvalue()


def npy_bytes(matrix: NDArray[np.floating]) -> bytes:
    """The ``.npy`` file of a matrix, as ``np.save`` writes it, in one copy of the data.

    The header is built once per dtype and shape (``np.save`` formats it
    anew each time, which costs more than erasing a vector).
    """
    matrix = np.ascontiguousarray(matrix)
    return b"".join((_npy_header(matrix.dtype.str, matrix.shape), matrix.data.cast("B")))


def json_bytes(content: dict[str, Any]) -> bytes:
    return orjson.dumps(content, option=orjson.OPT_SERIALIZE_NUMPY)
