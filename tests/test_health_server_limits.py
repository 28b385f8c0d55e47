"""The controller's health/metrics server under hostile clients (issue 9, item 5), with
real sockets on loopback:

- slowloris: idle sockets and sockets that dribble a header one byte at a time are
  closed by the server once the header deadline passes (the deadline is over the whole
  header, not per byte);
- a huge header is refused with 431 (RFC 6585, "Request Header Fields Too Large") and the
  rest of it is never read: a client pushing 16 MiB sees its connection closed long before;
- too many header lines: 431;
- beyond the connection cap a new connection gets 503 (RFC 9110 §15.6.4, "Service
  Unavailable") at once, without a thread of its own; when the idle ones are closed the
  server answers again;
- an ordinary request still works (and the server answers HTTP/1.0: one request per
  connection, no idle keep-alive).

Deadlines in these tests are short (0.5–1 s) so the test is quick; the assertions are on
behaviour (closed, refused, answered), never on how long something took.
"""

from __future__ import annotations

import socket
import threading
import time

import httpx
import pytest

from ratefit.controller.bounded_http import HttpLimits
from ratefit.controller.telemetry import HealthServer, Telemetry

#: a client waits at most this long for the server to act (generous: 2 shared cores)
PATIENCE = 20.0


def _connect(srv: HealthServer) -> socket.socket:
    s = socket.create_connection(("127.0.0.1", srv.port), timeout=PATIENCE)
    return s


def _read_all(s: socket.socket) -> bytes:
    """Everything the server sends until it closes (b"" if it closed without a word)."""
    data = b""
    try:
        while True:
            chunk = s.recv(65536)
            if not chunk:
                return data
            data += chunk
    except ConnectionResetError:
        return data


def _status(data: bytes) -> int:
    return int(data.split(b" ", 2)[1]) if data.startswith(b"HTTP/") else 0


@pytest.fixture()
def server():
    limits = HttpLimits(max_connections=4, header_timeout=1.0, write_timeout=5.0,
                        max_header_bytes=8192, max_headers=20)
    with HealthServer(Telemetry(), limits=limits) as srv:
        yield srv


def test_ordinary_request_answers_and_closes(server: HealthServer) -> None:
    r = httpx.get(server.url + "/healthz", timeout=PATIENCE)
    assert r.status_code == 200 and r.text == "ok\n"
    s = _connect(server)
    s.sendall(b"GET /metrics HTTP/1.1\r\nHost: x\r\nConnection: keep-alive\r\n\r\n")
    data = _read_all(s)  # returns only because the server closed after one answer
    s.close()
    assert data.startswith(b"HTTP/1.0 200") and b"ratefit_controller_leader" in data


def test_idle_and_dribbling_sockets_are_closed(server: HealthServer) -> None:
    idle = [_connect(server) for _ in range(3)]
    drip = _connect(server)
    stop = threading.Event()

    def dribble() -> None:  # slowloris: one byte of a never-ending header every 0.1 s
        payload = b"GET /healthz HTTP/1.1\r\nX-Slow: " + b"a" * 10_000
        for b in payload:
            if stop.is_set():
                return
            try:
                drip.send(bytes([b]))
            except OSError:
                return
            time.sleep(0.1)

    t = threading.Thread(target=dribble, daemon=True)
    t.start()
    try:
        for s in idle:
            assert _read_all(s) == b""  # closed by the server, nothing sent: no request came
        assert _read_all(drip) == b""  # closed although bytes kept coming
    finally:
        stop.set()
        t.join(timeout=5)
        for s in [*idle, drip]:
            s.close()
    # the slots are free again: the server answers
    assert httpx.get(server.url + "/healthz", timeout=PATIENCE).status_code == 200
    deadline = time.monotonic() + PATIENCE
    while server.active_connections and time.monotonic() < deadline:
        time.sleep(0.05)
    assert server.active_connections == 0


def test_header_over_the_byte_limit_gets_431(server: HealthServer) -> None:
    s = _connect(server)
    s.sendall(b"GET /healthz HTTP/1.1\r\nHost: x\r\nX-Big: " + b"b" * 20_000 + b"\r\n\r\n")
    data = _read_all(s)
    s.close()
    assert _status(data) == 431, data[:200]


def test_over_long_request_line_gets_431(server: HealthServer) -> None:
    s = _connect(server)
    s.sendall(b"GET /" + b"p" * 20_000 + b" HTTP/1.1\r\n\r\n")
    data = _read_all(s)
    s.close()
    assert _status(data) == 431, data[:200]


def test_too_many_header_lines_get_431(server: HealthServer) -> None:
    s = _connect(server)
    s.sendall(b"GET /healthz HTTP/1.1\r\n" + b"".join(b"X-H%d: v\r\n" % i for i in range(40)) + b"\r\n")
    data = _read_all(s)
    s.close()
    assert _status(data) == 431, data[:200]


def test_a_16_mib_header_is_never_read_to_the_end(server: HealthServer) -> None:
    s = _connect(server)
    total = 16 * 1024 * 1024
    sent = 0
    chunk = b"X-Huge: " + b"h" * 65536
    s.sendall(b"GET /healthz HTTP/1.1\r\n")
    with pytest.raises(OSError):  # BrokenPipe / ConnectionReset: the server hung up
        while sent < total:
            sent += s.send(chunk)
    s.close()
    assert sent < total


@pytest.fixture()
def patient_server():
    """Like `server`, with a header deadline long enough that the held sockets stay open
    for the whole test however loaded the machine is."""
    limits = HttpLimits(max_connections=4, header_timeout=60.0, write_timeout=5.0)
    with HealthServer(Telemetry(), limits=limits) as srv:
        yield srv


def test_connections_beyond_the_cap_get_503_then_service_resumes(patient_server: HealthServer) -> None:
    server = patient_server
    cap = server.limits.max_connections
    held = [_connect(server) for _ in range(cap)]
    # wait until the server has taken all of them (accept runs in its own thread)
    deadline = time.monotonic() + PATIENCE
    while server.active_connections < cap and time.monotonic() < deadline:
        time.sleep(0.01)
    assert server.active_connections == cap
    extra = _connect(server)
    extra.sendall(b"GET /healthz HTTP/1.0\r\n\r\n")
    data = _read_all(extra)
    extra.close()
    assert _status(data) == 503 and b"too many connections" in data
    assert server.refused_connections >= 1
    assert server.active_connections <= cap
    for s in held:
        s.close()
    deadline = time.monotonic() + PATIENCE
    while server.active_connections and time.monotonic() < deadline:
        time.sleep(0.05)
    assert httpx.get(server.url + "/readyz", timeout=PATIENCE).status_code == 503  # answered (not ready yet)


def test_limits_are_validated() -> None:
    with pytest.raises(ValueError, match="max_connections"):
        HttpLimits(max_connections=0)
    with pytest.raises(ValueError, match="positive"):
        HttpLimits(header_timeout=0)
