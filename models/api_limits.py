"""Connection-level limits of the sizing API server: header size and count, the time a
request may take to arrive, and the number of open connections.

uvicorn's httptools protocol (the fast HTTP parser ``ratefit serve`` uses) has none of
these: a client may send a header of 100 MB (parsed and held in memory before the
token is checked), or open thousands of sockets and send nothing (kept forever: the
keep-alive timeout is armed only after a response). ``LimitedHttpToolsProtocol``
subclasses that protocol and adds, per connection:

- a cap on the bytes of a request head (request line and headers), ``max_header_bytes``
  (default 64 KiB), and on the number of header fields, ``max_headers`` (default 100):
  above either, the answer is ``431 Request Header Fields Too Large`` (RFC 6585 §5) and
  the connection is closed before more is read;
- a deadline for a request to arrive completely (head and body), ``request_timeout``
  (default 10 s), armed when the connection opens and when a request begins: a socket
  that sends nothing, or a head or body byte by byte, is closed with ``408 Request
  Timeout`` (RFC 9110 §15.5.9) when its head is still incomplete;
- a cap on open connections, ``max_connections`` (default 256): a connection above it
  is closed at once, before anything is read.

Between requests, uvicorn's own keep-alive timeout (``--idle-timeout``) closes idle
connections. Each refusal is logged (at most once a second per kind) and counted in
``ratefit_api_connections_refused_total{reason}`` when the app has metrics.

Defaults: a real request head to this API is a few hundred bytes (common practice, no
source: nginx's default large header buffers are 4 × 8 KB); the pod's memory limit
(384 MiB) bounds the connection count.
"""

from __future__ import annotations

import asyncio
import logging
import time
from dataclasses import dataclass
from typing import Any

from uvicorn.protocols.http.httptools_impl import HttpToolsProtocol

__all__ = ["ConnectionLimits", "LimitedHttpToolsProtocol", "limited_protocol"]

log = logging.getLogger("ratefit.api")

_STATUS = {
    431: b"HTTP/1.1 431 Request Header Fields Too Large\r\n",
    408: b"HTTP/1.1 408 Request Timeout\r\n",
}


@dataclass(frozen=True)
class ConnectionLimits:
    max_header_bytes: int = 64 * 1024
    max_headers: int = 100
    request_timeout: float = 10.0
    max_connections: int = 256


class _TooManyHeaders(Exception):
    pass


class LimitedHttpToolsProtocol(HttpToolsProtocol):
    """uvicorn's httptools protocol with the limits of ``ConnectionLimits``."""

    limits: ConnectionLimits = ConnectionLimits()
    on_refused: Any = None  # callable(reason: str) -> None, e.g. a metric's inc

    def __init__(self, *args: Any, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self._in_head = True
        self._head_bytes = 0
        self._header_count = 0
        self._refusing: int | None = None
        self._deadline: asyncio.TimerHandle | None = None

    # -- connection ------------------------------------------------------------------------
    def connection_made(self, transport: asyncio.Transport) -> None:  # type: ignore[override]
        super().connection_made(transport)
        if len(self.connections) > self.limits.max_connections:
            _refused("max_connections", self.on_refused)
            transport.abort()  # nothing read, nothing answered: the cap holds memory flat
            return
        self._arm()

    def connection_lost(self, exc: Exception | None) -> None:
        self._disarm()
        super().connection_lost(exc)

    def data_received(self, data: bytes) -> None:
        if self._refusing is not None or self.transport.is_closing():
            return
        was_in_head = self._in_head
        if was_in_head and self._head_bytes + len(data) > self.limits.max_header_bytes:
            # feed only up to the cap: if the head does not end within it, refuse
            room = self.limits.max_header_bytes - self._head_bytes
            self._head_bytes += len(data)
            if room > 0:
                super().data_received(data[:room])
                if not self._in_head:  # the head ended inside the cap: go on with the rest
                    super().data_received(data[room:])
                    return
            if self._in_head and not self.transport.is_closing():
                self._refuse(431, "request head over the size cap", "header_bytes")
            return
        if was_in_head:
            self._head_bytes += len(data)
        super().data_received(data)

    # -- parser callbacks ------------------------------------------------------------------
    def on_message_begin(self) -> None:
        super().on_message_begin()
        self._in_head = True
        self._header_count = 0
        if self._deadline is None:
            self._arm()

    def on_header(self, name: bytes, value: bytes) -> None:
        self._header_count += 1
        if self._header_count > self.limits.max_headers:
            raise _TooManyHeaders()  # httptools turns it into a parser error: see send_400_response
        super().on_header(name, value)

    def on_headers_complete(self) -> None:
        self._in_head = False
        super().on_headers_complete()

    def on_message_complete(self) -> None:
        self._disarm()
        super().on_message_complete()
        self._in_head = True
        self._head_bytes = 0

    def send_400_response(self, msg: str) -> None:
        if self._header_count > self.limits.max_headers:
            self._refuse(431, "too many header fields", "header_count")
            return
        super().send_400_response(msg)

    # -- helpers ---------------------------------------------------------------------------
    def _arm(self) -> None:
        self._disarm()
        self._deadline = self.loop.call_later(self.limits.request_timeout, self._timed_out)

    def _disarm(self) -> None:
        if self._deadline is not None:
            self._deadline.cancel()
            self._deadline = None

    def _timed_out(self) -> None:
        self._deadline = None
        if self.transport.is_closing():
            return
        if self._in_head:
            self._refuse(408, "request not received in time", "request_timeout")
        else:  # the body is late: the app sees a disconnect
            _refused("request_timeout", self.on_refused)
            self.transport.close()

    def _refuse(self, status: int, message: str, reason: str) -> None:
        self._refusing = status
        self._disarm()
        _refused(reason, self.on_refused)
        body = f'{{"error":"{message}","errors":[]}}'.encode()
        self.transport.write(
            _STATUS[status]
            + b"content-type: application/json\r\nconnection: close\r\ncontent-length: "
            + str(len(body)).encode()
            + b"\r\n\r\n"
            + body
        )
        self.transport.close()


_last_log: dict[str, float] = {}


def _refused(reason: str, count: Any) -> None:
    if count is not None:
        count(reason)
    now = time.monotonic()
    if now - _last_log.get(reason, 0.0) >= 1.0:  # at most one line a second per reason
        _last_log[reason] = now
        log.warning("connection refused: %s", reason, extra={"event": "connection_refused", "reason": reason})


def limited_protocol(limits: ConnectionLimits, *, on_refused: Any = None) -> type[LimitedHttpToolsProtocol]:
    """A protocol class for ``uvicorn.Config(http=...)`` with these limits."""
    return type(
        "LimitedHttpToolsProtocol",
        (LimitedHttpToolsProtocol,),
        {"limits": limits, "on_refused": staticmethod(on_refused) if on_refused is not None else None},
    )
