"""Local helper servers started as child processes: the real Prometheus on a
backfilled history, and ``ratefit serve``; used by ``ratefit demo``, the test
fixtures and the benchmarks, so all of them start and stop these servers one way.

Every server binds 127.0.0.1 on a free port, runs in its own process group
(``start_new_session``) and is stopped with SIGTERM then SIGKILL when the context
manager exits — also on errors and Ctrl-C — so nothing is left running.

Prometheus history is backfilled with ``promtool tsdb create-blocks-from openmetrics
FILE DIR`` (Prometheus docs, "Backfilling from OpenMetrics format"); the server runs
with a configuration that scrapes nothing and a long retention, so a fixed-date
history is never deleted.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx

from ratefit.models.errors import RatefitError

__all__ = [
    "LocalServerError",
    "LocalServer",
    "free_port",
    "stop_process",
    "wait_http",
    "prometheus_binaries",
    "backfill",
    "run_prometheus",
    "run_serve",
]

_NO_SCRAPE_CONFIG = "# ratefit: no scrape targets; the history is backfilled\nglobal:\n  scrape_interval: 1m\nscrape_configs: []\n"


class LocalServerError(RatefitError):
    """A local helper server could not be started; the message says which and why."""


@dataclass(frozen=True)
class LocalServer:
    url: str
    pid: int
    log: Path


def free_port() -> int:
    """A port that was free on 127.0.0.1 a moment ago (callers retry on a lost race)."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def stop_process(proc: subprocess.Popen[Any], *, grace: float = 10.0) -> None:
    """SIGTERM the process group, then SIGKILL after ``grace`` seconds."""
    if proc.poll() is not None:
        return
    with contextlib.suppress(ProcessLookupError):
        os.killpg(proc.pid, signal.SIGTERM)
    try:
        proc.wait(timeout=grace)
    except subprocess.TimeoutExpired:
        with contextlib.suppress(ProcessLookupError):
            os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(timeout=grace)


def wait_http(url: str, proc: subprocess.Popen[Any], *, timeout: float, log: Path, what: str) -> None:
    """Wait until ``url`` answers 200; LocalServerError (with the log's tail) otherwise."""
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if proc.poll() is not None:
            raise LocalServerError(f"{what} exited with {proc.returncode}; log tail:\n{_tail(log)}")
        try:
            if httpx.get(url, timeout=1.0).status_code == 200:
                return
        except httpx.HTTPError:
            pass
        time.sleep(0.1)
    raise LocalServerError(f"{what} was not ready at {url} after {timeout:.0f}s; log tail:\n{_tail(log)}")


def _tail(log: Path, n: int = 1500) -> str:
    try:
        return log.read_text(errors="replace")[-n:]
    except OSError:
        return "(no log)"


def prometheus_binaries(
    prometheus: str | None = None, promtool: str | None = None
) -> tuple[str, str] | None:
    """(prometheus, promtool) when both are installed and executable, else None.
    Defaults: ``$RATEFIT_PROMETHEUS_BIN``/``$RATEFIT_PROMTOOL_BIN``, then the PATH."""
    found = []
    for given, env, name in ((prometheus, "RATEFIT_PROMETHEUS_BIN", "prometheus"),
                             (promtool, "RATEFIT_PROMTOOL_BIN", "promtool")):
        path = given or os.environ.get(env) or shutil.which(name) or f"/usr/bin/{name}"
        if not os.access(path, os.X_OK):
            return None
        found.append(path)
    return found[0], found[1]


def _require_binaries() -> tuple[str, str]:
    found = prometheus_binaries()
    if found is None:
        raise LocalServerError("prometheus/promtool are not installed (Debian: apt-get install prometheus)")
    return found


def backfill(openmetrics: Path, data_dir: Path, *, timeout: float = 600.0) -> None:
    """Write TSDB blocks for an OpenMetrics history into ``data_dir`` with promtool."""
    _, promtool = _require_binaries()
    r = subprocess.run(
        [promtool, "tsdb", "create-blocks-from", "openmetrics", str(openmetrics), str(data_dir)],
        capture_output=True, text=True, timeout=timeout,
    )
    if r.returncode != 0:
        raise LocalServerError(f"promtool backfill of {openmetrics} failed ({r.returncode}): {r.stderr[-2000:]}")


@contextlib.contextmanager
def run_prometheus(data_dir: Path, *, ready_timeout: float = 60.0, attempts: int = 3) -> Iterator[LocalServer]:
    """Serve the TSDB in ``data_dir`` on a free loopback port until the block exits."""
    prometheus, _ = _require_binaries()
    data_dir = Path(data_dir)
    config = data_dir.parent / f"{data_dir.name}-prometheus.yml"
    config.write_text(_NO_SCRAPE_CONFIG)
    log_path = data_dir.parent / f"{data_dir.name}-prometheus.log"
    last: LocalServerError | None = None
    for _ in range(attempts):  # the free port may be taken between the probe and the bind
        port = free_port()
        url = f"http://127.0.0.1:{port}"
        with open(log_path, "w") as log:
            proc = subprocess.Popen(
                [prometheus, f"--config.file={config}", f"--storage.tsdb.path={data_dir}",
                 f"--web.listen-address=127.0.0.1:{port}",
                 "--storage.tsdb.retention.time=3650d",  # fixed-date histories must not be deleted
                 "--log.level=warn"],
                stdout=log, stderr=subprocess.STDOUT, start_new_session=True,
            )
        try:
            try:
                wait_http(url + "/-/ready", proc, timeout=ready_timeout, log=log_path, what="Prometheus")
            except LocalServerError as exc:
                last = exc
                continue
            yield LocalServer(url=url, pid=proc.pid, log=log_path)
            return
        finally:
            stop_process(proc)
    raise last or LocalServerError("Prometheus did not start")


@contextlib.contextmanager
def run_serve(store: Path, work: Path, *, timeout: float = 60.0, extra_args: tuple[str, ...] = ()) -> Iterator[LocalServer]:
    """A ``ratefit serve`` child process over ``store`` on a free loopback port."""
    port = free_port()
    log = Path(work) / "serve.log"
    exe = Path(sys.executable).with_name("ratefit")
    cmd = [str(exe)] if exe.exists() else [sys.executable, "-m", "ratefit.controller.cli"]
    with open(log, "w") as fh:
        proc = subprocess.Popen(
            [*cmd, "serve", "--store", str(store), "--host", "127.0.0.1", "--port", str(port), *extra_args],
            stdout=fh, stderr=subprocess.STDOUT, start_new_session=True,
        )
    try:
        url = f"http://127.0.0.1:{port}"
        wait_http(url + "/readyz", proc, timeout=timeout, log=log, what="ratefit serve")
        yield LocalServer(url=url, pid=proc.pid, log=log)
    finally:
        stop_process(proc)
