"""Open-loop HTTP/1.1 load generator on raw asyncio streams.

Open loop: request *i* of a run at rate λ is due at ``t0 + i/λ`` and is sent at that
time whether or not earlier requests have answered. A due request takes an idle
keep-alive connection or opens a new one (up to ``max_connections``); only when all
connections are busy does it wait, and its latency still counts from its *scheduled*
time, so a stalled server shows up as latency instead of being hidden by a slower
sender ("coordinated omission"). The scheduler sleeps to absolute due times, so
timer jitter never accumulates into a lower rate: a late wake-up sends every overdue
request at once.

Each :class:`Outcome` records the scheduled, dispatched (the client's task began),
sent and finished times (event-loop monotonic clock, seconds), the HTTP status and an error text. Bodies are read and
discarded: ``Content-Length``, ``Transfer-Encoding: chunked`` and close-delimited
bodies are understood. Plain ``http://`` and ``https://`` (default TLS context) URLs.

Nothing here measures CPU or judges results: see ``cpu_probe`` and ``steps``.
"""

from __future__ import annotations

import asyncio
import math
import ssl
from collections import deque
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from urllib.parse import urlsplit

from ratefit.models.errors import InputError, RatefitError

__all__ = ["Target", "Outcome", "LoadGenerator", "LoadError", "parse_target"]

_MAX_HEADER_BYTES = 64 * 1024


class LoadError(RatefitError):
    """The target cannot be reached at all (checked before any step runs)."""


@dataclass(frozen=True, slots=True)
class Target:
    """Where and what to send: parsed once from the URL and options."""

    scheme: str
    host: str
    port: int
    path: str  # path and query, never empty
    method: str = "GET"
    headers: tuple[tuple[str, str], ...] = ()
    body: bytes = b""

    @property
    def url(self) -> str:
        return f"{self.scheme}://{self.host}:{self.port}{self.path}"

    def request_bytes(self) -> bytes:
        host = f"[{self.host}]" if ":" in self.host else self.host
        lines = [f"{self.method} {self.path} HTTP/1.1", f"Host: {host}:{self.port}"]
        names = {k.lower() for k, _ in self.headers}
        lines += [f"{k}: {v}" for k, v in self.headers]
        if "user-agent" not in names:
            lines.append("User-Agent: ratefit-profile")
        if self.body or self.method in ("POST", "PUT", "PATCH"):
            lines.append(f"Content-Length: {len(self.body)}")
        return ("\r\n".join(lines) + "\r\n\r\n").encode("latin-1") + self.body


def parse_target(
    url: str,
    *,
    method: str = "GET",
    headers: Mapping[str, str] | None = None,
    body: bytes = b"",
) -> Target:
    """A :class:`Target` from ``url``; InputError with a one-line reason otherwise."""
    try:
        parts = urlsplit(url)
        port = parts.port
    except ValueError as exc:
        raise InputError(f"--url {url!r}: {exc}; write e.g. http://127.0.0.1:8080/path") from None
    if parts.scheme not in ("http", "https"):
        raise InputError(f"--url {url!r}: the scheme must be http or https, e.g. http://127.0.0.1:8080/path")
    if not parts.hostname:
        raise InputError(f"--url {url!r}: no host; write e.g. http://127.0.0.1:8080/path")
    if parts.username or parts.password:
        raise InputError(f"--url {url!r}: credentials in the URL are not supported; use --header 'Authorization: …'")
    path = parts.path or "/"
    if parts.query:
        path += "?" + parts.query
    if any(c in path for c in "\r\n "):
        raise InputError(f"--url {url!r}: the path holds spaces or line breaks; percent-encode them")
    m = method.upper()
    if not m.isalpha():
        raise InputError(f"--method {method!r}: an HTTP method is a word such as GET or POST")
    hdrs: list[tuple[str, str]] = []
    for k, v in (headers or {}).items():
        if not k or any(c in k for c in ":\r\n ") or any(c in v for c in "\r\n"):
            raise InputError(f"--header {k!r}: write 'Name: value' on one line")
        if k.lower() in ("host", "content-length", "transfer-encoding"):
            raise InputError(f"--header {k!r}: set by the load generator itself")
        hdrs.append((k, v))
    return Target(
        scheme=parts.scheme,
        host=parts.hostname,
        port=port or (443 if parts.scheme == "https" else 80),
        path=path,
        method=m,
        headers=tuple(hdrs),
        body=body,
    )


@dataclass(frozen=True, slots=True)
class Outcome:
    """One request: times on the event loop's monotonic clock (seconds)."""

    scheduled: float
    sent: float
    finished: float
    status: int  # 0 when no HTTP answer came
    error: str = ""
    dispatched: float = math.nan  # when the client got round to it (late only when the client is starved)

    @property
    def ok(self) -> bool:
        return not self.error and 200 <= self.status < 400

    @property
    def latency(self) -> float:
        """From the scheduled send time to the end of the response (seconds)."""
        return self.finished - self.scheduled


class _Conn:
    __slots__ = ("reader", "writer")

    def __init__(self, reader: asyncio.StreamReader, writer: asyncio.StreamWriter) -> None:
        self.reader = reader
        self.writer = writer

    def close(self) -> None:
        self.writer.close()


class _HTTPError(Exception):
    pass


class _StaleConnection(_HTTPError):
    """The server closed the connection before answering (an idle keep-alive timed out)."""


class LoadGenerator:
    """Sends ``target`` requests on an open-loop schedule; reuse it across steps.

    ``timeout`` bounds one request from its scheduled time (seconds); a request
    not answered by then is an error ``timeout``. ``max_connections`` bounds the
    open connections (a busy server holds one per outstanding request).
    """

    def __init__(self, target: Target, *, timeout: float = 10.0, max_connections: int = 1024) -> None:
        if not timeout > 0:
            raise InputError(f"--timeout: {timeout!r} must be a positive number of seconds")
        if max_connections < 1:
            raise InputError(f"--max-connections: {max_connections!r} must be at least 1")
        self.target = target
        self.timeout = float(timeout)
        self.max_connections = int(max_connections)
        self._request = target.request_bytes()
        self._idle: deque[_Conn] = deque()
        self._open = 0
        self._freed: asyncio.Condition | None = None
        self._ssl = ssl.create_default_context() if target.scheme == "https" else None

    # -- connections ----------------------------------------------------------------
    async def _connect(self) -> _Conn:
        reader, writer = await asyncio.open_connection(
            self.target.host, self.target.port, ssl=self._ssl, limit=_MAX_HEADER_BYTES
        )
        return _Conn(reader, writer)

    async def _acquire(self) -> _Conn:
        if self._freed is None:
            self._freed = asyncio.Condition()
        while True:
            if self._idle:
                return self._idle.pop()
            if self._open < self.max_connections:
                return await self._open_counted()
            async with self._freed:
                await self._freed.wait()

    async def _acquire_new(self) -> _Conn:
        """A fresh connection (never an idle one), within ``max_connections``."""
        while self._open >= self.max_connections:
            if self._idle:
                self._idle.pop().close()
                self._open -= 1
                break
            async with self._freed:  # type: ignore[union-attr]
                await self._freed.wait()  # type: ignore[union-attr]
        return await self._open_counted()

    async def _open_counted(self) -> _Conn:
        """Connect, counting the connection as open (uncounted again if connecting fails)."""
        self._open += 1
        try:
            return await self._connect()
        except BaseException:
            self._open -= 1
            await self._notify()
            raise

    async def _notify(self) -> None:
        if self._freed is not None:
            async with self._freed:
                self._freed.notify()

    async def _release(self, conn: _Conn, reusable: bool) -> None:
        if reusable:
            self._idle.append(conn)
        else:
            conn.close()
            self._open -= 1
        await self._notify()

    async def aclose(self) -> None:
        while self._idle:
            self._idle.pop().close()
            self._open -= 1

    # -- one request ----------------------------------------------------------------
    async def _exchange(self, conn: _Conn) -> tuple[int, bool]:
        conn.writer.write(self._request)
        await conn.writer.drain()
        r = conn.reader
        try:
            head = await r.readuntil(b"\r\n\r\n")
        except asyncio.IncompleteReadError as exc:
            if not exc.partial:
                raise _StaleConnection("connection closed before a response") from None
            raise _HTTPError("connection closed inside the headers") from None
        lines = head.split(b"\r\n")
        parts = lines[0].split(None, 2)
        if len(parts) < 2 or not parts[0].startswith(b"HTTP/") or not parts[1].isdigit():
            raise _HTTPError(f"not an HTTP response: {lines[0][:60]!r}")
        status = int(parts[1])
        keep = parts[0] == b"HTTP/1.1"
        length: int | None = None
        chunked = False
        for h in lines[1:]:
            if not h:
                continue
            name, _, value = h.partition(b":")
            name = name.strip().lower()
            value = value.strip()
            if name == b"content-length":
                length = int(value)
            elif name == b"transfer-encoding":
                chunked = b"chunked" in value.lower()
            elif name == b"connection":
                v = value.lower()
                keep = b"close" not in v and (keep or b"keep-alive" in v)
        if self.target.method == "HEAD" or status in (204, 304) or 100 <= status < 200:
            return status, keep
        if chunked:
            while True:
                size_line = await r.readline()
                if not size_line:
                    raise _HTTPError("connection closed inside a chunked body")
                size = int(size_line.split(b";", 1)[0].strip() or b"0", 16)
                if size == 0:
                    while (await r.readline()) not in (b"\r\n", b"\n", b""):
                        pass
                    break
                await r.readexactly(size + 2)
        elif length is not None:
            await r.readexactly(length)
        else:
            await r.read()  # close-delimited body
            keep = False
        return status, keep

    async def _one(self, scheduled: float, sink: Callable[[Outcome], None]) -> None:
        loop = asyncio.get_running_loop()
        sent = scheduled
        started = loop.time()
        conn: _Conn | None = None
        try:
            async with asyncio.timeout_at(scheduled + self.timeout):
                reused = bool(self._idle)
                conn = await self._acquire()
                sent = loop.time()
                try:
                    status, keep = await self._exchange(conn)
                except (_StaleConnection, ConnectionResetError, BrokenPipeError):
                    if not reused:
                        raise
                    # a kept-alive connection the server closed while idle: once more on a new one
                    await self._release(conn, False)
                    conn = None
                    conn = await self._acquire_new()
                    status, keep = await self._exchange(conn)
            await self._release(conn, keep)
            sink(Outcome(scheduled, sent, loop.time(), status, "", started))
        except TimeoutError:
            if conn is not None:
                await self._release(conn, False)
            sink(Outcome(scheduled, sent, loop.time(), 0, "timeout", started))
        except (OSError, asyncio.IncompleteReadError, asyncio.LimitOverrunError, ValueError, _HTTPError) as exc:
            if conn is not None:
                await self._release(conn, False)
            kind = type(exc).__name__ if not isinstance(exc, _HTTPError) else str(exc)
            sink(Outcome(scheduled, sent, loop.time(), 0, kind, started))

    # -- a run --------------------------------------------------------------------------
    async def run(
        self,
        rate: float,
        duration: float,
        sink: Callable[[Outcome], None],
        *,
        start: float | None = None,
    ) -> float:
        """Send at ``rate`` req/s for ``duration`` s from ``start`` (loop time; default
        now) and wait until every request has an outcome (at most ``timeout`` after
        the last one was due). Returns the start time used."""
        if not rate > 0:
            raise InputError(f"rate {rate!r} must be positive")
        loop = asyncio.get_running_loop()
        t0 = loop.time() if start is None else start
        n = int(duration * rate)
        interval = 1.0 / rate
        tasks: set[asyncio.Task[None]] = set()
        i = 0
        while i < n:
            now = loop.time()
            while i < n and t0 + i * interval <= now:
                task = loop.create_task(self._one(t0 + i * interval, sink))
                tasks.add(task)
                task.add_done_callback(tasks.discard)
                i += 1
            if i < n:
                await asyncio.sleep(max(0.0, t0 + i * interval - loop.time()))
        if tasks:
            await asyncio.gather(*list(tasks))
        return t0

    async def probe(self) -> Outcome:
        """One request now; LoadError when no connection can be made."""
        got: list[Outcome] = []
        loop = asyncio.get_running_loop()
        await self._one(loop.time(), got.append)
        out = got[0]
        if out.status == 0:
            raise LoadError(
                f"cannot reach {self.target.url}: {out.error}; check --url and that the service is running"
            )
        return out
