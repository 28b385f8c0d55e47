"""Real HTTP servers for the profiler's tests, started on a free loopback port and
stopped by the PID we started (``local_servers.stop_process``, never by name).

- :func:`run_nginx` — Debian ``nginx-light`` serving one JSON document with
  ``gzip on`` and no ``gzip_static``, so every request compresses the document
  again and costs CPU; its own config, pid file, logs and temp paths under a
  test directory; ``daemon off`` so the master stays our child and its workers
  are the master's children.
- :func:`run_cpu_app` — a single-process uvicorn server whose handler burns a
  fixed amount of its thread's CPU time per request (``time.thread_time``), so
  one worker saturates at about 1/cost req/s; ``/metrics`` exposes the
  process's CPU counter in the Prometheus text format (prometheus_client's
  process collector, ``process_cpu_seconds_total``).

The JSON document is invented for the tests (parcels of the demo's "Kestrel Post"
scenario, marked as such).
"""

from __future__ import annotations

import contextlib
import json
import os
import random
import shutil
import subprocess
import sys
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

from ratefit.controller.local_servers import free_port, stop_process, wait_http

NGINX = shutil.which("nginx") or "/usr/sbin/nginx"


@dataclass(frozen=True)
class Served:
    url: str
    pid: int
    workers: tuple[int, ...]
    log: Path


def nginx_missing_reason() -> str | None:
    """Why nginx tests cannot run here, or None. Root machines install it (Makefile)."""
    if os.access(NGINX, os.X_OK):
        return None
    return "nginx is not installed (Debian: apt-get install -y nginx-light; `make test` installs it as root)"


def require_nginx() -> None:
    """Skip when nginx is missing and we are not root; fail when root (CI): there
    `make test` installs nginx-light, so a missing binary is a broken set-up."""
    import pytest

    reason = nginx_missing_reason()
    if reason is None:
        return
    if os.geteuid() == 0:
        pytest.fail(reason)
    pytest.skip(reason)


def parcels_json(n: int = 400, seed: int = 7) -> bytes:
    """An INVENTED Kestrel Post parcel list, about 100 bytes per parcel."""
    rnd = random.Random(seed)
    depots = ["Harbour Row", "Millbank", "Kestrel Yard", "North Gate", "Tanner's Lane"]
    rows = [
        {
            "parcel": f"KP{100000 + i}",
            "depot": rnd.choice(depots),
            "weight_g": rnd.randint(50, 20000),
            "status": rnd.choice(["sorted", "in van", "delivered", "held"]),
            "eta_min": rnd.randint(5, 600),
        }
        for i in range(n)
    ]
    return json.dumps({"scenario": "Kestrel Post (invented)", "parcels": rows}).encode()


def _wait_ready(url: str, proc: subprocess.Popen, log: Path, timeout: float = 20.0) -> None:
    """Until ``url`` answers 200 (the one readiness wait of controller/local_servers)."""
    wait_http(url, proc, timeout=timeout, log=log, what="server")


def _children(pid: int) -> tuple[int, ...]:
    out = []
    for entry in os.scandir("/proc"):
        if entry.name.isdigit():
            try:
                text = Path(f"/proc/{entry.name}/stat").read_text()
            except OSError:
                continue
            if int(text[text.rindex(")") + 2 :].split()[1]) == pid:
                out.append(int(entry.name))
    return tuple(sorted(out))


@contextlib.contextmanager
def run_nginx(work: Path, *, workers: int = 1, parcels: int = 400) -> Iterator[Served]:
    work = Path(work)
    (work / "www").mkdir(parents=True, exist_ok=True)
    (work / "www" / "parcels.json").write_bytes(parcels_json(parcels))
    for d in ("body", "proxy", "fastcgi", "uwsgi", "scgi", "logs"):
        (work / d).mkdir(exist_ok=True)
    port = free_port()
    conf = work / "nginx.conf"
    user = "user root;" if os.geteuid() == 0 else ""
    conf.write_text(
        f"""{user}
worker_processes {workers};
daemon off;
pid {work}/nginx.pid;
error_log {work}/logs/error.log warn;
events {{ worker_connections 2048; }}
http {{
    access_log off;
    client_body_temp_path {work}/body;
    proxy_temp_path {work}/proxy;
    fastcgi_temp_path {work}/fastcgi;
    uwsgi_temp_path {work}/uwsgi;
    scgi_temp_path {work}/scgi;
    types {{ application/json json; }}
    default_type application/octet-stream;
    keepalive_requests 100000;
    gzip on;
    gzip_types application/json;
    gzip_comp_level 6;
    gzip_min_length 0;
    server {{
        listen 127.0.0.1:{port};
        root {work}/www;
    }}
}}
"""
    )
    log = work / "logs" / "stderr.log"
    with open(log, "w") as fh:
        proc = subprocess.Popen(
            [NGINX, "-p", str(work), "-e", str(work / "logs" / "error.log"), "-c", str(conf)],
            stdout=fh, stderr=subprocess.STDOUT, start_new_session=True,
        )
    try:
        url = f"http://127.0.0.1:{port}/parcels.json"
        _wait_ready(url, proc, log)
        kids: tuple[int, ...] = ()
        for _ in range(100):
            kids = _children(proc.pid)
            if len(kids) >= workers:
                break
            time.sleep(0.05)
        yield Served(url=url, pid=proc.pid, workers=kids, log=log)
    finally:
        stop_process(proc)


CPU_APP = '''
"""A test server: each request to / burns COST seconds of this thread's CPU time."""
import os, time
from prometheus_client import generate_latest

COST = float(os.environ["COST_S"])

async def app(scope, receive, send):
    if scope["type"] != "http":
        return
    if scope["path"] == "/metrics":
        body = generate_latest()
    else:
        end = time.thread_time() + COST
        while time.thread_time() < end:
            pass
        body = b"ok"
    await send({"type": "http.response.start", "status": 200,
                "headers": [(b"content-type", b"text/plain"), (b"content-length", str(len(body)).encode())]})
    await send({"type": "http.response.body", "body": body})
'''


@contextlib.contextmanager
def run_cpu_app(work: Path, *, cost_s: float) -> Iterator[Served]:
    work = Path(work)
    work.mkdir(parents=True, exist_ok=True)
    (work / "cpu_app.py").write_text(CPU_APP)
    port = free_port()
    log = work / "cpu_app.log"
    env = {**os.environ, "COST_S": str(cost_s), "PYTHONPATH": str(work)}
    with open(log, "w") as fh:
        proc = subprocess.Popen(
            [sys.executable, "-m", "uvicorn", "cpu_app:app", "--host", "127.0.0.1", "--port", str(port),
             "--workers", "1", "--no-access-log", "--log-level", "warning", "--backlog", "4096",
             "--timeout-graceful-shutdown", "1"],
            stdout=fh, stderr=subprocess.STDOUT, start_new_session=True, env=env, cwd=work,
        )
    try:
        url = f"http://127.0.0.1:{port}/"
        _wait_ready(url + "metrics", proc, log)
        yield Served(url=url, pid=proc.pid, workers=(), log=log)
    finally:
        stop_process(proc)


@contextlib.contextmanager
def run_scraping_prometheus(work: Path, target: str, *, prometheus: str, interval: str = "1s") -> Iterator[Served]:
    """The real Prometheus scraping ``target`` (host:port, path /metrics) as job ``app``
    every ``interval``, with its own data directory, on a free loopback port."""
    from ratefit.controller.local_servers import wait_http

    work = Path(work)
    (work / "data").mkdir(parents=True, exist_ok=True)
    conf = work / "prometheus.yml"
    conf.write_text(
        f"global:\n  scrape_interval: {interval}\n  evaluation_interval: {interval}\n"
        f"scrape_configs:\n  - job_name: app\n    static_configs:\n      - targets: ['{target}']\n"
    )
    port = free_port()
    log = work / "prometheus.log"
    with open(log, "w") as fh:
        proc = subprocess.Popen(
            [prometheus, f"--config.file={conf}", f"--storage.tsdb.path={work / 'data'}",
             f"--web.listen-address=127.0.0.1:{port}", "--log.level=warn"],
            stdout=fh, stderr=subprocess.STDOUT, start_new_session=True,
        )
    try:
        url = f"http://127.0.0.1:{port}"
        wait_http(url + "/-/ready", proc, timeout=60, log=log, what="Prometheus")
        yield Served(url=url, pid=proc.pid, workers=(), log=log)
    finally:
        stop_process(proc)
