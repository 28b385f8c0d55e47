"""Shared helpers for tests (and benchmarks) of the sizing API.

- ``make_artifact(key, …)``: a sealed ``Artifact`` built directly from a known linear
  curve (``cpu = base + slope × rate`` cores) through ``DemandCurve.tabulate``, so
  tests know the true answer without training anything.
- ``write_store(root, n)`` / ``demo_keys(n)``: N artifacts in a temporary store.
- ``serve_process(store, …)``: a real ``ratefit serve`` subprocess on a free loopback
  port; a context manager that waits for ``/readyz`` and always kills the process
  (also when the test fails or startup times out). ``ServeProcess`` carries
  ``base_url``, ``token``, ``pid``, ``headers`` and the path of its stderr log.

Everything here is an invented scenario (namespaces ``shop``/``bank``…, workloads
``wl-00042``) marked as such.

Import from tests as ``from api_fixtures import …`` (pytest puts tests/ on sys.path)
or as ``from tests.api_fixtures import …`` from the repository root.
"""

from __future__ import annotations

import contextlib
import os
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import httpx
import numpy as np

from ratefit.models.curve import DemandCurve
from ratefit.models.store import Artifact, CurveData, CVRow, DataWindow, ModelStore

RATEFIT = Path(sys.executable).with_name("ratefit")
NAMESPACES = ("shop", "bank", "media", "search")  # invented demo scenario


def demo_keys(n: int) -> list[str]:
    """``n`` distinct keys of an invented scenario."""
    return [f"{NAMESPACES[i % len(NAMESPACES)]}/wl-{i:05d}/app" for i in range(n)]


def make_artifact(
    key: str,
    *,
    base: float = 0.05,
    slope: float = 0.004,
    rate_lo: float = 0.0,
    rate_hi: float = 200.0,
    band: float = 0.02,
    chosen: str = "linear",
    trained_at: str = "2026-01-01T00:00:00Z",
) -> Artifact:
    """A sealed artifact whose curve is ``base + slope × rate`` cores on [rate_lo, rate_hi]."""
    curve = DemandCurve.tabulate(lambda r: base + slope * r, rate_lo=rate_lo, rate_hi=rate_hi, band=band)
    art = Artifact(
        key=key,
        chosen=chosen,
        coverage=0.95,
        rate_range=(rate_lo, rate_hi),
        curve=CurveData(**curve.to_dict()),
        samples=500,
        samples_total=520,
        dropped={"throttled": 12, "warmup": 8},
        cv=[
            CVRow(model="fixed", rmse=0.3, mae=0.25, p95=0.6),
            CVRow(model=chosen, rmse=0.01, mae=0.008, p95=0.02, params={"degree": 1}),
        ],
        folds=5,
        seed=7,
        window=DataWindow(source="invented test scenario"),
        trained_at=trained_at,
    )
    return art.sealed()


def write_store(
    root: str | os.PathLike[str], n: int, *, keys: Sequence[str] | None = None, slope_of=None, **kw: float
) -> list[str]:
    """Write ``n`` artifacts (or one per ``keys``) into the store at ``root``.
    ``slope_of(i)`` sets the slope of the i-th curve (default: varies with i)."""
    store = ModelStore(root)
    ks = list(keys) if keys is not None else demo_keys(n)
    for i, key in enumerate(ks):
        slope = slope_of(i) if slope_of is not None else 0.002 + 0.0001 * (i % 50)
        store.save(make_artifact(key, slope=slope, **kw))
    return ks


def expected(art: Artifact, rate: float) -> dict[str, object]:
    """The answer the API must give, computed from the artifact's own curve."""
    look = art.demand_curve().lookup([rate])
    cpu_m, upper_m = look.millicores()
    return {
        "model": art.key,
        "rate": float(rate),
        "demand_m": int(cpu_m[0]),
        "demand_bound_m": int(upper_m[0]),
        "extrapolated": bool(np.asarray(look.extrapolated)[0]),
        "version": art.version,
    }


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@dataclass
class ServeProcess:
    proc: subprocess.Popen[bytes]
    base_url: str
    port: int
    token: str | None
    log_path: Path
    store: Path
    extra: dict[str, object] = field(default_factory=dict)

    @property
    def pid(self) -> int:
        return self.proc.pid

    @property
    def headers(self) -> dict[str, str]:
        return {"Authorization": f"Bearer {self.token}"} if self.token else {}

    def client(self, **kw: object) -> httpx.Client:
        return httpx.Client(base_url=self.base_url, headers=self.headers, timeout=30.0, **kw)  # type: ignore[arg-type]

    def log_text(self) -> str:
        return self.log_path.read_text(encoding="utf-8", errors="replace") if self.log_path.exists() else ""

    def stop(self, *, timeout: float = 10.0) -> int | None:
        """SIGTERM, wait, then SIGKILL; returns the exit code."""
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout=timeout)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(timeout=timeout)
        return self.proc.returncode


@contextlib.contextmanager
def serve_process(
    store: str | os.PathLike[str],
    *,
    token: str | None = None,
    workdir: str | os.PathLike[str] | None = None,
    extra_args: Sequence[str] = (),
    log_level: str = "info",
    ready_timeout: float = 60.0,
) -> Iterator[ServeProcess]:
    """Run ``ratefit serve --store STORE`` on a free 127.0.0.1 port until the block ends.

    Waits until ``/readyz`` answers 200. The process is always stopped (SIGTERM, then
    SIGKILL) when the block exits, whatever happened."""
    work = Path(workdir) if workdir is not None else Path(store).parent
    work.mkdir(parents=True, exist_ok=True)
    token_args: list[str] = []
    if token is not None:
        token_file = work / f"token-{os.getpid()}-{time.monotonic_ns()}"
        token_file.write_text(token + "\n", encoding="utf-8")
        token_file.chmod(0o600)
        token_args = ["--token-file", str(token_file)]
    # The fixture binds the port itself and hands the listening socket to the child
    # (`ratefit serve --fd N`): no window in which another process on this shared
    # machine could take the port, so whoever answers on it is our server.
    listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
    try:
        listener.bind(("127.0.0.1", 0))
        listener.listen(512)
        port = int(listener.getsockname()[1])
        log_path = work / f"serve-{port}.log"
        cmd = [
            str(RATEFIT),
            "serve",
            "--store",
            str(store),
            "--fd",
            str(listener.fileno()),
            "--log-level",
            log_level,
            *token_args,
            *extra_args,
        ]
        with open(log_path, "wb") as log_file:
            proc = subprocess.Popen(
                cmd,
                stdout=log_file,
                stderr=subprocess.STDOUT,
                stdin=subprocess.DEVNULL,
                pass_fds=(listener.fileno(),),
                preexec_fn=_die_with_parent,
            )
    finally:
        listener.close()  # the child holds its own copy
    server = ServeProcess(proc, f"http://127.0.0.1:{port}", port, token, log_path, Path(store))
    try:
        if not _wait_ready(server, ready_timeout):
            raise RuntimeError(f"ratefit serve did not become ready; its log:\n{server.log_text()[-3000:]}")
        yield server
    finally:
        server.stop()


def _die_with_parent() -> None:
    """In the child, before exec: ask Linux to SIGTERM it when the test process dies,
    even by SIGKILL (prctl PR_SET_PDEATHSIG), so a killed test run leaves no server."""
    try:
        import ctypes

        ctypes.CDLL(None, use_errno=True).prctl(1, signal.SIGTERM)  # 1 = PR_SET_PDEATHSIG
    except (OSError, AttributeError):  # not Linux: the context manager still stops it
        pass


def _wait_ready(server: ServeProcess, timeout: float) -> bool:
    """True once ``/readyz`` answers 200 while the process is alive."""
    deadline = time.monotonic() + timeout
    with httpx.Client(base_url=server.base_url, headers=server.headers, timeout=2.0) as c:
        while time.monotonic() < deadline:
            if server.proc.poll() is not None:
                return False
            try:
                if c.get("/readyz").status_code == 200:
                    return server.proc.poll() is None
            except httpx.TransportError:
                pass
            time.sleep(0.05)
    return False
