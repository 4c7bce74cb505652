"""A minimal HTTP/1.1 keep-alive client on asyncio streams, for the load generator only.

httpx is the project's client, but its connection pool, shared by 32
concurrent tasks, tops out near 350 requests/s on this machine while the
server answers 3,700/s to a bare socket: measured with httpx, the load test
would measure httpx.  This client does just what the load needs: POST with a
``Content-Length`` body, read a ``Content-Length`` or chunked answer, keep
the connection open.
"""

from __future__ import annotations

import asyncio
import contextlib
from dataclasses import dataclass


class WireError(Exception):
    """The connection broke or the answer was not valid HTTP/1.1."""


@dataclass(frozen=True)
class Answer:
    status: int
    headers: dict[str, str]
    body: bytes


class Connection:
    """One keep-alive connection to ``host:port``; opened on first use and reopened after the server closes it."""

    def __init__(self, host: str, port: int, *, timeout: float = 30.0) -> None:
        self.host, self.port, self.timeout = host, port, timeout
        self._reader: asyncio.StreamReader | None = None
        self._writer: asyncio.StreamWriter | None = None

    async def post(self, path: str, body: bytes, headers: dict[str, str]) -> Answer:
        try:
            return await asyncio.wait_for(self._exchange(path, body, headers), self.timeout)
        except (OSError, asyncio.IncompleteReadError, asyncio.LimitOverrunError, TimeoutError, ValueError) as error:
            await self.close()
            raise WireError(f"{type(error).__name__}: {error}") from None

    async def _exchange(self, path: str, body: bytes, headers: dict[str, str]) -> Answer:
        if self._writer is None:
            self._reader, self._writer = await asyncio.open_connection(self.host, self.port)
        assert self._reader is not None
        lines = [f"POST {path} HTTP/1.1", f"Host: {self.host}:{self.port}", f"Content-Length: {len(body)}"]
        lines += [f"{key}: {value}" for key, value in headers.items()]
        self._writer.write(("\r\n".join(lines) + "\r\n\r\n").encode("latin1") + body)
        await self._writer.drain()
        head = (await self._reader.readuntil(b"\r\n\r\n")).decode("latin1").split("\r\n")
        parts = head[0].split(" ", 2)
        if len(parts) < 2 or not parts[0].startswith("HTTP/1."):
            raise ValueError(f"not an HTTP/1.1 status line: {head[0]!r}")
        answer_headers = {}
        for line in head[1:]:
            if line:
                key, _, value = line.partition(":")
                answer_headers[key.strip().lower()] = value.strip()
        if answer_headers.get("transfer-encoding", "").lower() == "chunked":
            content = await self._read_chunked()
        else:
            content = await self._reader.readexactly(int(answer_headers.get("content-length", "0")))
        if answer_headers.get("connection", "").lower() == "close":
            await self.close()
        return Answer(int(parts[1]), answer_headers, content)

    async def _read_chunked(self) -> bytes:
        assert self._reader is not None
        chunks: list[bytes] = []
        while True:
            size = int((await self._reader.readuntil(b"\r\n")).split(b";")[0], 16)
            if size == 0:
                await self._reader.readuntil(b"\r\n")
                return b"".join(chunks)
            chunks.append(await self._reader.readexactly(size))
            await self._reader.readexactly(2)

    async def close(self) -> None:
        writer, self._reader, self._writer = self._writer, None, None
        if writer is not None:
            writer.close()
            with contextlib.suppress(OSError):
                await writer.wait_closed()
