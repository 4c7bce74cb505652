"""Progress of long work, reported to whoever is listening (the CLI draws bars; library use stays silent).

Estimators call :func:`advance` from their loops; nothing is shown unless a
caller wraps the work in :func:`reporting`.  A context variable, not an
estimator parameter, carries the listener, so estimators stay plain
scikit-learn objects that clone and pickle as usual.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import contextmanager
from contextvars import ContextVar

#: ``listener(stage, done, total)``: ``done`` steps of ``total`` (None if unknown) finished in ``stage``.
Listener = Callable[[str, int, int | None], None]

_listener: ContextVar[Listener | None] = ContextVar("veil_progress_listener", default=None)


def advance(stage: str, done: int, total: int | None) -> None:
    """Tell the listener, if any, that ``done`` of ``total`` steps of ``stage`` are finished."""
    listener = _listener.get()
    if listener is not None:
        listener(stage, done, total)


@contextmanager
def reporting(listener: Listener) -> Iterator[None]:
    """Send every :func:`advance` made inside the block to ``listener``."""
    token = _listener.set(listener)
    try:
        yield
    finally:
        _listener.reset(token)


@contextmanager
def phase(stage: str) -> Iterator[None]:
    """Report one step of a longer job (reading, fitting, storing) as a stage of one step, started then finished."""
    advance(stage, 0, 1)
    yield
    advance(stage, 1, 1)
