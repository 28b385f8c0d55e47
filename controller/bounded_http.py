"""A small stdlib HTTP server with limits, for the controller's health and metrics routes.

The stdlib ``ThreadingHTTPServer`` starts a thread per connection, waits forever for a
request that never comes, and reads up to 100 header lines of 64 KiB each. On a port
that probes and Prometheus reach, that lets idle or slow sockets pile up threads and a
huge header eat memory. :class:`BoundedHTTPServer` adds, per :class:`HttpLimits`:

- a connection cap: beyond ``max_connections`` open connections a new one gets
  ``503 Service Unavailable`` (written without blocking) and is closed at once, in the
  accepting thread — no thread is started for it;
- a header deadline: the request line and all headers must arrive within
  ``header_timeout`` seconds of the connection (a hard deadline over the whole
  header, not per ``recv``, so bytes dribbled one at a time do not extend it);
  after that the socket is closed;
- bounded headers: at most ``max_header_bytes`` for the request line and headers
  together and ``max_headers`` header lines, else ``431 Request Header Fields Too
  Large`` and the connection is closed — the rest is never read;
- a write timeout for the answer (``write_timeout``), and one request per connection
  (HTTP/1.0: no idle keep-alive sockets).

The numbers are small because the routes are three GETs with no body (common
practice, no source: web servers default to a few KiB to 8 KiB per header line and
tens of seconds for a header).
"""

from __future__ import annotations

import http.client
import socket
import threading
import time
from dataclasses import dataclass
from collections.abc import Callable, Mapping
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any, Self

#: what a route answers: (status code, body, content type)
Answer = tuple[int, bytes, str]
TEXT = "text/plain; charset=utf-8"

__all__ = ["HttpLimits", "BoundedHTTPServer", "BoundedHandler", "GetServer", "Answer"]


@dataclass(frozen=True)
class HttpLimits:
    """Limits of one :class:`BoundedHTTPServer` (see the module docstring)."""

    max_connections: int = 64
    header_timeout: float = 5.0
    write_timeout: float = 10.0
    max_header_bytes: int = 16 * 1024
    max_headers: int = 50

    def __post_init__(self) -> None:
        if self.max_connections < 1:
            raise ValueError(f"max_connections must be at least 1, got {self.max_connections}")
        if self.header_timeout <= 0 or self.write_timeout <= 0:
            raise ValueError("header_timeout and write_timeout must be positive seconds")
        if self.max_header_bytes < 256 or self.max_headers < 1:
            raise ValueError("max_header_bytes must be at least 256 and max_headers at least 1")


class _HeaderReader:
    """``rfile`` for the handler: reads lines from the socket under a hard deadline and a
    byte and line budget (the handler never reads a body here)."""

    def __init__(self, sock: socket.socket, limits: HttpLimits) -> None:
        self._sock = sock
        self._limits = limits
        self._deadline = time.monotonic() + limits.header_timeout
        self._buf = b""
        self._read = 0
        self._lines = 0

    def readline(self, limit: int = -1) -> bytes:
        self._lines += 1
        if self._lines > self._limits.max_headers + 2:  # request line + headers + blank line
            raise http.client.HTTPException(f"more than {self._limits.max_headers} header lines")
        while b"\n" not in self._buf:
            if self._read >= self._limits.max_header_bytes:
                raise http.client.LineTooLong(f"headers larger than {self._limits.max_header_bytes} bytes")
            left = self._deadline - time.monotonic()
            if left <= 0:
                raise TimeoutError(f"no complete header within {self._limits.header_timeout:g}s")
            self._sock.settimeout(left)
            chunk = self._sock.recv(min(4096, self._limits.max_header_bytes - self._read))
            if not chunk:  # the client closed: hand back what there is (an empty line ends it)
                line, self._buf = self._buf, b""
                return line
            self._read += len(chunk)
            self._buf += chunk
        line, _, self._buf = self._buf.partition(b"\n")
        return line + b"\n"

    def read(self, n: int = -1) -> bytes:  # no route reads a body
        return b""

    def close(self) -> None:
        pass


class BoundedHandler(BaseHTTPRequestHandler):
    """Base handler for :class:`BoundedHTTPServer`: header limits and timeouts applied;
    subclasses add ``do_GET`` etc. as with the stdlib."""

    server: BoundedHTTPServer
    protocol_version = "HTTP/1.0"  # one request per connection: no idle keep-alive sockets

    def setup(self) -> None:
        super().setup()
        self.rfile = _HeaderReader(self.connection, self.server.limits)  # type: ignore[assignment]

    def handle_one_request(self) -> None:
        try:
            super().handle_one_request()
        except http.client.HTTPException:  # an over-long request line (headers: parse_request)
            self.requestline, self.request_version, self.command = "", "HTTP/1.0", ""
            self.send_error(431, "Request header fields too large")
            self.close_connection = True
        except OSError:  # reset by the peer, or a timeout while writing the answer
            self.close_connection = True

    def end_headers(self) -> None:
        # the answer is written under its own timeout, not what was left of the header's
        self.connection.settimeout(self.server.limits.write_timeout)
        super().end_headers()

    def log_message(self, format: str, *args: object) -> None:  # noqa: A002
        pass  # probes every few seconds would flood the controller's log

    def finish(self) -> None:
        try:
            super().finish()
        except OSError:
            pass


_BUSY = (b"HTTP/1.0 503 Service Unavailable\r\nContent-Type: text/plain; charset=utf-8\r\n"
         b"Content-Length: 21\r\nConnection: close\r\n\r\ntoo many connections\n")


class BoundedHTTPServer(ThreadingHTTPServer):
    """``ThreadingHTTPServer`` with :class:`HttpLimits` (see the module docstring)."""

    daemon_threads = True
    block_on_close = False
    #: listen backlog (socketserver's default is 5: a burst of connections then waits
    #: for SYN retries, seconds each, instead of being answered or refused at once)
    request_queue_size = 128

    def __init__(self, address: tuple[str, int], handler: type[BoundedHandler], *,
                 limits: HttpLimits | None = None) -> None:
        self.limits = limits or HttpLimits()
        self._slots = threading.BoundedSemaphore(self.limits.max_connections)
        self._count_lock = threading.Lock()
        self._active = 0
        #: connections answered 503 because the cap was reached (since start)
        self.refused = 0
        super().__init__(address, handler)

    @property
    def active_connections(self) -> int:
        with self._count_lock:
            return self._active

    def process_request(self, request: Any, client_address: Any) -> None:
        if not self._slots.acquire(blocking=False):
            with self._count_lock:
                self.refused += 1
            try:
                request.setblocking(False)  # never stall the accepting thread
                request.send(_BUSY)
            except OSError:
                pass
            self.close_request(request)
            return
        with self._count_lock:
            self._active += 1
        try:
            super().process_request(request, client_address)
        except BaseException:
            self._release()
            raise

    def process_request_thread(self, request: Any, client_address: Any) -> None:
        try:
            super().process_request_thread(request, client_address)
        finally:
            self._release()

    def _release(self) -> None:
        with self._count_lock:
            self._active -= 1
        self._slots.release()

    def shutdown_request(self, request: Any) -> None:
        """Half-close, then read (and drop) what the client still sends — at most 64 KiB
        for at most 0.5 s — so that an answer such as 431 is not lost to a TCP reset
        from closing a socket with unread data (a lingering close)."""
        try:
            request.shutdown(socket.SHUT_WR)
            deadline, left = time.monotonic() + 0.5, 64 * 1024
            while left > 0:
                wait = deadline - time.monotonic()
                if wait <= 0:
                    break
                request.settimeout(wait)
                chunk = request.recv(min(left, 16 * 1024))
                if not chunk:
                    break
                left -= len(chunk)
        except OSError:
            pass
        self.close_request(request)


class GetServer:
    """A :class:`BoundedHTTPServer` on a daemon thread answering a few GET routes: ``routes``
    maps a path (query string ignored) to a function giving its :data:`Answer`; any other
    path gets 404 with ``not_found``. ``port=0`` picks a free port (read it back from
    :attr:`port`). Used by the controller's health server and `ratefit serve --metrics-port`."""

    def __init__(self, routes: Mapping[str, Callable[[], Answer]], *, host: str = "127.0.0.1", port: int = 0,
                 limits: HttpLimits | None = None, not_found: bytes = b"not found\n", name: str = "ratefit-http") -> None:
        table = dict(routes)

        class Handler(BoundedHandler):
            def do_GET(self) -> None:  # noqa: N802 - stdlib naming
                route = table.get(self.path.split("?", 1)[0])
                code, body, ctype = route() if route is not None else (404, not_found, TEXT)
                self.send_response(code)
                self.send_header("Content-Type", ctype)
                self.send_header("Content-Length", str(len(body)))
                self.end_headers()
                self.wfile.write(body)

        self._server = BoundedHTTPServer((host, port), Handler, limits=limits)
        self._name = name
        self._thread: threading.Thread | None = None

    @property
    def limits(self) -> HttpLimits:
        return self._server.limits

    @property
    def active_connections(self) -> int:
        """Connections being served now (at most ``limits.max_connections``)."""
        return self._server.active_connections

    @property
    def refused_connections(self) -> int:
        """Connections answered 503 because the cap was reached, since start."""
        return self._server.refused

    @property
    def port(self) -> int:
        return int(self._server.server_address[1])

    @property
    def url(self) -> str:
        return f"http://{self._server.server_address[0]}:{self.port}"

    def start(self) -> Self:
        self._thread = threading.Thread(target=self._server.serve_forever, name=self._name, daemon=True)
        self._thread.start()
        return self

    def stop(self) -> None:
        self._server.shutdown()
        self._server.server_close()
        if self._thread is not None:
            self._thread.join(timeout=5)

    def __enter__(self) -> Self:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()
