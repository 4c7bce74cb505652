"""The client's exceptions (documented in the package docstring)."""

from __future__ import annotations


class VeilError(Exception):
    """Base of every error the client raises."""


class VeilValidationError(VeilError, ValueError):
    """The input was refused before any request was sent (wrong shape, NaN, not numbers, empty)."""


class VeilTransportError(VeilError):
    """The service could not be reached or did not answer in time, after every retry."""


class VeilHTTPError(VeilError):
    """The service answered with an error status.

    Attributes
    ----------
    status : int
        The HTTP status.
    code : str
        The service's machine-readable error code (``wrong_dimension``, ``unknown_eraser``, ...),
        or ``"unknown"`` if the body was not a veil error.
    message : str
        The service's human-readable message.
    """

    def __init__(self, status: int, code: str, message: str) -> None:
        super().__init__(f"{status} {code}: {message}")
        self.status = status
        self.code = code
        self.message = message


class VeilClientError(VeilHTTPError):
    """A 4xx: the request was wrong; retrying it unchanged cannot help."""


class VeilEmbeddingModelError(VeilClientError):
    """A 409 ``embedding_model_mismatch``: the version serving the request was fitted on another embedding model
    than the one the client states (``embedding_model=``).  Permanent: never retried.

    Attributes
    ----------
    stated : str
        The model the request stated, ``NAME`` or ``NAME@VERSION``.
    recorded : str
        The model the version's card records.
    """

    def __init__(self, status: int, code: str, message: str, *, stated: str, recorded: str) -> None:
        super().__init__(status, code, message)
        self.stated = stated
        self.recorded = recorded


class VeilServerError(VeilHTTPError):
    """A 5xx (a 503 only after every retry)."""
