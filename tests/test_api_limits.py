"""Connection limits of `ratefit serve` (models/api_limits.py), tried with raw sockets
against a real server process on 127.0.0.1 (issue 9, item 5).

Status codes: 431 Request Header Fields Too Large (RFC 6585 §5), 408 Request Timeout
(RFC 9110 §15.5.9). Every wait below is a safety bound so that a broken server fails
the test instead of hanging it; nothing asserts how fast the server is (speed is for
the benchmarks).
"""

from __future__ import annotations

import socket
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest
from api_fixtures import ServeProcess, serve_process, write_store

from ratefit.controller.commands.serve import exposure_warning

HEAD = b"GET /healthz HTTP/1.1\r\nHost: 127.0.0.1\r\n"
SAFETY = 30.0  # seconds: only to keep a broken server from hanging the suite


@pytest.fixture(scope="module")
def server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[ServeProcess]:
    work = tmp_path_factory.mktemp("limits")
    write_store(work / "store", 2)
    with serve_process(
        work / "store",
        workdir=work,
        log_level="warning",
        extra_args=["--request-timeout", "1s", "--idle-timeout", "1s", "--max-connections", "8"],
    ) as srv:
        yield srv


def _connect(srv: ServeProcess) -> socket.socket:
    s = socket.create_connection(("127.0.0.1", srv.port), timeout=SAFETY)
    return s


def _read_all(s: socket.socket) -> bytes:
    """Everything the server sends until it closes the connection."""
    out = b""
    while True:
        try:
            chunk = s.recv(65536)
        except (ConnectionResetError, BrokenPipeError):
            break
        if not chunk:
            break
        out += chunk
    return out


def _metric(srv: ServeProcess, reason: str) -> float:
    text = httpx.get(f"{srv.base_url}/metrics", timeout=SAFETY).text
    for line in text.splitlines():
        if line.startswith(f'ratefit_api_connections_refused_total{{reason="{reason}"}}'):
            return float(line.rsplit(" ", 1)[1])
    return 0.0


def _rss_kib(pid: int) -> int:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    raise AssertionError("no VmRSS")


def test_a_100_mb_header_is_refused_after_the_cap_not_read(server: ServeProcess) -> None:
    before = _metric(server, "header_bytes")
    s = _connect(server)
    s.sendall(HEAD + b"X-Filler: ")
    chunk = b"a" * (1 << 20)
    sent = 0
    try:
        for _ in range(100):  # up to 100 MiB
            s.sendall(chunk)
            sent += len(chunk)
    except (BrokenPipeError, ConnectionResetError):
        pass  # the server closed the connection: what we want
    answer = _read_all(s)
    s.close()
    # the server stopped reading at the 64 KiB cap: the client could push only what the
    # kernel's socket buffers hold (a few MiB on Linux) before the connection was closed
    assert sent < 32 * (1 << 20), f"the server kept reading: {sent} bytes accepted"
    if answer:  # the 431 may be lost when the close resets the connection before we read it
        assert answer.startswith(b"HTTP/1.1 431 "), answer[:100]
    assert _metric(server, "header_bytes") == before + 1
    with httpx.Client(base_url=server.base_url, timeout=SAFETY) as c:  # and the server still serves
        assert c.get("/healthz").status_code == 200


def test_three_huge_headers_at_once_leave_memory_flat(server: ServeProcess) -> None:
    """Issue 9 saw 585 MiB after three 100 MB headers at once. The cap is the test: the
    server's resident memory must not grow by anything like the bytes sent."""
    rss0 = _rss_kib(server.pid)
    socks = [_connect(server) for _ in range(3)]
    for s in socks:
        s.sendall(HEAD + b"X-Filler: ")
    chunk = b"b" * (1 << 20)
    sent = 0
    alive = list(socks)
    for _ in range(100):
        for s in list(alive):
            try:
                s.sendall(chunk)
                sent += len(chunk)
            except (BrokenPipeError, ConnectionResetError):
                alive.remove(s)
        if not alive:
            break
    for s in socks:
        _read_all(s)
        s.close()
    grown_mib = (_rss_kib(server.pid) - rss0) / 1024
    assert not alive, "a connection was still accepting after 100 MiB"
    assert grown_mib < 32, f"RSS grew by {grown_mib:.0f} MiB for {sent >> 20} MiB sent"


def test_too_many_header_fields_get_431(server: ServeProcess) -> None:
    s = _connect(server)
    s.sendall(HEAD + b"".join(b"X-H%d: v\r\n" % i for i in range(150)) + b"\r\n")
    answer = _read_all(s)
    s.close()
    assert answer.startswith(b"HTTP/1.1 431 "), answer[:100]
    s = _connect(server)  # 99 more are fine (100 with Host)
    s.sendall(HEAD + b"".join(b"X-H%d: v\r\n" % i for i in range(98)) + b"Connection: close\r\n\r\n")
    assert _read_all(s).startswith(b"HTTP/1.1 200 ")
    s.close()


def test_a_silent_socket_is_closed_after_the_request_timeout(server: ServeProcess) -> None:
    before = _metric(server, "request_timeout")
    s = _connect(server)
    started = time.monotonic()
    answer = _read_all(s)  # blocks until the server closes (SAFETY bounds it)
    s.close()
    assert time.monotonic() - started < SAFETY
    assert answer.startswith(b"HTTP/1.1 408 "), answer[:100]
    assert _metric(server, "request_timeout") >= before + 1


def test_a_head_sent_byte_by_byte_is_cut_off(server: ServeProcess) -> None:
    """The slow-headers attack: every byte arrives before any idle timeout would fire,
    but the head as a whole never completes; the request deadline closes it."""
    s = _connect(server)
    s.settimeout(0.2)
    closed = False
    payload = HEAD + b"X-Slow: " + b"z" * 10_000
    deadline = time.monotonic() + SAFETY
    for byte in payload:
        if time.monotonic() > deadline:
            break
        try:
            s.send(bytes([byte]))
            data = s.recv(4096)
            if data.startswith(b"HTTP/1.1 408 ") or data == b"":
                closed = True
                break
        except TimeoutError:
            continue
        except (BrokenPipeError, ConnectionResetError):
            closed = True
            break
    s.close()
    assert closed, "the server kept reading a head that never ends"


def test_an_idle_keep_alive_connection_is_closed(server: ServeProcess) -> None:
    s = _connect(server)
    s.sendall(HEAD + b"\r\n")
    first = b""
    while b'{"status":"ok"}' not in first:  # the whole answer (head and body may come apart)
        chunk = s.recv(65536)
        assert chunk, first
        first += chunk
    assert first.startswith(b"HTTP/1.1 200 ")
    rest = _read_all(s)  # then nothing: the keep-alive timeout closes it
    s.close()
    assert rest == b""


def test_connections_above_the_cap_are_closed_at_once(server: ServeProcess) -> None:
    before = _metric(server, "max_connections")
    held = [_connect(server) for _ in range(8)]
    time.sleep(0.2)  # let the server accept them (not a timing assertion)
    extra = [_connect(server) for _ in range(4)]
    try:
        for s in extra:
            s.settimeout(SAFETY)
            try:
                assert s.recv(1) == b""  # closed without an answer
            except ConnectionResetError:
                pass
    finally:
        for s in held + extra:
            s.close()
    time.sleep(0.2)
    with httpx.Client(base_url=server.base_url, timeout=SAFETY) as c:  # the cap frees as they close
        assert c.get("/healthz").status_code == 200
    assert _metric(server, "max_connections") >= before + 4


def test_fd_without_a_token_warns_like_host(tmp_path: Path) -> None:
    # the same rule for --host and an inherited --fd socket (only loopback may go without a
    # token); tests never bind beyond loopback, so the non-loopback side is checked on the
    # rule itself and the loopback side on a real process
    assert "--fd 3 (bound to 10.1.2.3) without --token-file" in (exposure_warning("10.1.2.3", None, fd=3) or "")
    assert "0.0.0.0 without --token-file" in (exposure_warning("0.0.0.0", None) or "")
    assert exposure_warning("0.0.0.0", "t0ken") is None
    assert exposure_warning("127.0.0.1", None, fd=3) is None and exposure_warning("::1", None) is None
    write_store(tmp_path / "store", 1)
    with serve_process(tmp_path / "store", workdir=tmp_path, log_level="warning") as srv:
        pass
    assert "without --token-file" not in srv.log_text()
