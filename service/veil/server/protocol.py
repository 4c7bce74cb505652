"""uvicorn's HTTP protocols with ``TCP_NODELAY`` set on every accepted connection.

asyncio sets ``TCP_NODELAY`` only on sockets created with ``IPPROTO_TCP``;
the listening socket uvicorn binds for ``--workers > 1`` has protocol 0, so
its connections keep Nagle's algorithm.  Each response is written as two
segments (head, then body), and a small body then waits for the client's
delayed ACK: a constant ~44 ms per request, measured by ``make reliability``
with two workers (183 requests/s against 1,800 with one).  Both protocols
``veil serve`` can run (httptools, the default, and the pure-Python h11)
set it themselves, whatever the event loop and the number of workers.
"""

from __future__ import annotations

import asyncio
import socket

from uvicorn.protocols.http.h11_impl import H11Protocol
from uvicorn.protocols.http.httptools_impl import HttpToolsProtocol


def no_delay(transport: asyncio.BaseTransport) -> None:
    """Turn Nagle's algorithm off on a TCP connection (a Unix socket has none)."""
    connection = transport.get_extra_info("socket")
    if connection is not None and connection.family in (socket.AF_INET, socket.AF_INET6):
        connection.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)


class NoDelayH11Protocol(H11Protocol):
    """The pure-Python protocol (h11), for ``veil serve --http h11``."""

    def connection_made(self, transport: asyncio.Transport) -> None:  # type: ignore[override]
        no_delay(transport)
        super().connection_made(transport)


class NoDelayHttpToolsProtocol(HttpToolsProtocol):
    """The default protocol (httptools' C parser)."""

    def connection_made(self, transport: asyncio.Transport) -> None:  # type: ignore[override]
        no_delay(transport)
        super().connection_made(transport)
