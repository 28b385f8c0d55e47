"""pytest fixtures that run the real Prometheus server (Debian package) on loopback.

History is backfilled with ``promtool tsdb create-blocks-from openmetrics FILE DIR``
(Prometheus docs, "Backfilling from OpenMetrics format"), then ``/usr/bin/prometheus``
starts on that TSDB with a config that scrapes nothing, on a free 127.0.0.1 port, and
the fixture waits for ``/-/ready``. The process is killed afterwards, also when the test
or the start-up fails. Checked against 2.42: a history ending minutes before "now" is
queryable with instant queries at ``time=end`` without ``--storage.tsdb.allow-overlapping-blocks``
(the head stays empty because nothing is scraped, so no block overlaps it).

When ``prometheus``/``promtool`` are missing the tests skip, unless
``RATEFIT_REQUIRE_PROMETHEUS=1`` (CI), where they fail.

Fixtures:

* ``scenario_prometheus`` (session): the INVENTED Kestrel Post history (6 h, 30 s steps,
  seed 0, ending 5 min before now), yields :class:`PromHistory`.
* ``prometheus_from_openmetrics`` (function): a factory ``start(path) -> PromServer``
  for a test's own OpenMetrics file; servers stop at the end of the test.
* ``canned_server`` (function): a loopback HTTP server answering what the test sets with
  ``canned_server.set(status=, body=, content_type=, delay_s=)`` — garbage, 5xx, slowness.
* ``closed_port_url`` (function): a loopback URL nothing listens on (connection refused).

Helpers for other fixtures: ``backfill(openmetrics, data_dir)``, ``run_prometheus(data_dir)``
(context manager → :class:`PromServer`), ``require_prometheus()``.

Register in ``tests/conftest.py``: ``pytest_plugins = ["prom_fixtures"]``.
"""

from __future__ import annotations

import contextlib
import os
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterator

import pytest

from ratefit.controller import local_servers

SCENARIO_HOURS = 6
SCENARIO_STEP_S = 30
SCENARIO_SEED = 0


@dataclass(frozen=True)
class PromServer:
    url: str
    data_dir: Path
    pid: int


@dataclass(frozen=True)
class PromHistory:
    """A running Prometheus loaded with the scenario history."""

    url: str
    start: float  # first sample time
    end: float  # last sample time: query here (instant queries with ``at=end``)
    step_s: float
    hours: float
    seed: int
    openmetrics: Path


def binaries() -> tuple[str, str] | None:
    """(prometheus, promtool) if both are installed, else None."""
    return local_servers.prometheus_binaries()


def require_prometheus() -> tuple[str, str]:
    """The binaries, or skip (fail when RATEFIT_REQUIRE_PROMETHEUS=1)."""
    found = binaries()
    if found is None:
        msg = "prometheus/promtool not installed (Debian: apt-get install prometheus)"
        if os.environ.get("RATEFIT_REQUIRE_PROMETHEUS") == "1":
            pytest.fail(msg + " and RATEFIT_REQUIRE_PROMETHEUS=1")
        pytest.skip(msg)
    return found


def backfill(openmetrics: Path, data_dir: Path) -> None:
    """``promtool tsdb create-blocks-from openmetrics`` into ``data_dir``; raises with promtool's output."""
    require_prometheus()
    local_servers.backfill(Path(openmetrics), Path(data_dir), timeout=300)


@contextlib.contextmanager
def run_prometheus(data_dir: Path, *, ready_timeout: float = 60.0) -> Iterator[PromServer]:
    """Start Prometheus on ``data_dir`` (a TSDB), wait for ``/-/ready``, stop it on exit."""
    require_prometheus()
    with local_servers.run_prometheus(Path(data_dir), ready_timeout=ready_timeout) as srv:
        yield PromServer(url=srv.url, data_dir=Path(data_dir), pid=srv.pid)


@pytest.fixture(scope="session")
def scenario_prometheus(tmp_path_factory: pytest.TempPathFactory) -> Iterator[PromHistory]:
    """The real Prometheus with the INVENTED scenario history (6 h, ends 5 min before now)."""
    require_prometheus()
    from ratefit.models.scenario import write_openmetrics

    base = tmp_path_factory.mktemp("prom-scenario")
    info = write_openmetrics(
        base / "history.om", end=time.time() - 300, hours=SCENARIO_HOURS, step_s=SCENARIO_STEP_S, seed=SCENARIO_SEED
    )
    backfill(info.path, base / "tsdb")
    with run_prometheus(base / "tsdb") as srv:
        yield PromHistory(
            url=srv.url, start=info.start, end=info.end, step_s=info.step_s,
            hours=SCENARIO_HOURS, seed=SCENARIO_SEED, openmetrics=info.path,
        )


@pytest.fixture
def prometheus_from_openmetrics(tmp_path: Path) -> Iterator[Callable[[Path], PromServer]]:
    """Factory: backfill an OpenMetrics file and start a Prometheus on it (stopped after the test)."""
    require_prometheus()
    stack = contextlib.ExitStack()
    counter = [0]

    def start(openmetrics: Path) -> PromServer:
        counter[0] += 1
        data = tmp_path / f"tsdb{counter[0]}"
        backfill(Path(openmetrics), data)
        return stack.enter_context(run_prometheus(data))

    with stack:
        yield start


# ----------------------------------------------------------------------------------------
# A tiny loopback HTTP server with canned answers: what a broken or wrong "Prometheus" says.


@dataclass
class CannedAnswer:
    status: int = 200
    body: bytes = b""
    content_type: str = "application/json"
    delay_s: float = 0.0


class CannedServer:
    """Answers every request with ``self.answer`` (mutable between calls); counts requests."""

    def __init__(self) -> None:
        import http.server
        import threading

        outer = self
        self.answer = CannedAnswer()
        self.requests = 0

        class Handler(http.server.BaseHTTPRequestHandler):
            def _reply(self) -> None:
                outer.requests += 1
                length = int(self.headers.get("content-length") or 0)
                if length:
                    self.rfile.read(length)
                a = outer.answer
                if a.delay_s:
                    time.sleep(a.delay_s)
                try:
                    self.send_response(a.status)
                    self.send_header("Content-Type", a.content_type)
                    self.send_header("Content-Length", str(len(a.body)))
                    self.end_headers()
                    self.wfile.write(a.body)
                except (BrokenPipeError, ConnectionResetError):
                    pass

            do_GET = do_POST = _reply

            def log_message(self, *args: object) -> None:
                pass

        self._httpd = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self._httpd.daemon_threads = True
        self.url = f"http://127.0.0.1:{self._httpd.server_address[1]}"
        self._thread = threading.Thread(target=self._httpd.serve_forever, kwargs={"poll_interval": 0.05}, daemon=True)
        self._thread.start()

    def set(self, *, status: int = 200, body: bytes | str = b"", content_type: str = "application/json",
            delay_s: float = 0.0) -> None:
        self.answer = CannedAnswer(status, body.encode() if isinstance(body, str) else body, content_type, delay_s)

    def close(self) -> None:
        self._httpd.shutdown()
        self._httpd.server_close()
        self._thread.join(timeout=5)


@pytest.fixture
def canned_server() -> Iterator[CannedServer]:
    """A loopback HTTP server answering what the test sets with ``canned_server.set(...)``."""
    srv = CannedServer()
    try:
        yield srv
    finally:
        srv.close()


@pytest.fixture
def closed_port_url() -> str:
    """A loopback URL nothing listens on (connection refused)."""
    return f"http://127.0.0.1:{local_servers.free_port()}"
