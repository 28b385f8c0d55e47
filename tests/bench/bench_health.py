"""The controller's health/metrics server under hostile clients: what it costs.

``python -m tests.bench.bench_health [--idle 3000] [--header-mib 100]``

Starts a :class:`HealthServer` with its default limits (in this process) and measures:

1. idle sockets — opens ``--idle`` connections that send nothing: how many the server
   took (at most its cap), how many it answered 503, the peak thread count and RSS, and
   how long until the server had closed every one (its header deadline);
2. a huge header — one client streams ``--header-mib`` MiB of header: how much it could
   send before the server hung up, and the RSS growth;
3. an ordinary ``GET /metrics`` afterwards, and its latency.

Benchmarks, not tests: figures are printed, nothing is asserted.
"""

from __future__ import annotations

import argparse
import resource
import socket
import threading
import time

import httpx

from ratefit.controller.telemetry import HealthServer, Telemetry


def _rss_mib() -> float:
    with open("/proc/self/status", encoding="ascii") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m tests.bench.bench_health", description=__doc__,
                                 formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--idle", type=int, default=3000, help="idle connections to open (default %(default)s)")
    ap.add_argument("--header-mib", type=int, default=100, help="size of the huge header in MiB (default %(default)s)")
    args = ap.parse_args(argv)

    with HealthServer(Telemetry()) as srv:
        lim = srv.limits
        print(f"limits: max_connections={lim.max_connections} header_timeout={lim.header_timeout}s "
              f"max_header_bytes={lim.max_header_bytes} max_headers={lim.max_headers}")
        rss0, threads0 = _rss_mib(), threading.active_count()
        socks, t0 = [], time.perf_counter()
        for _ in range(args.idle):
            s = socket.create_connection(("127.0.0.1", srv.port), timeout=30)
            socks.append(s)
        opened = time.perf_counter() - t0
        time.sleep(0.5)
        peak_threads, peak_active = threading.active_count(), srv.active_connections
        rss_idle = _rss_mib()
        # wait for the server to close every idle socket (recv returns b"" or a 503)
        t1 = time.perf_counter()
        for s in socks:
            try:
                s.recv(1024)
            except OSError:
                pass
            s.close()
        closed_after = time.perf_counter() - t1
        print(f"idle: {args.idle} sockets opened in {opened:.2f}s; server took {peak_active} "
              f"(cap {lim.max_connections}), answered {srv.refused_connections} with 503; "
              f"threads {threads0} -> {peak_threads}; RSS {rss0:.1f} -> {rss_idle:.1f} MiB; "
              f"all closed by the server within {closed_after:.2f}s of the last open")

        rss1 = _rss_mib()
        s = socket.create_connection(("127.0.0.1", srv.port), timeout=30)
        s.sendall(b"GET /healthz HTTP/1.1\r\nX-Huge: ")
        chunk, sent, total = b"h" * 65536, 0, args.header_mib * 1024 * 1024
        t2 = time.perf_counter()
        try:
            while sent < total:
                sent += s.send(chunk)
        except OSError as exc:
            outcome = type(exc).__name__
        else:
            outcome = "all sent"
        s.close()
        print(f"huge header: {sent / 1024:.0f} KiB of {args.header_mib} MiB sent before the server hung up "
              f"({outcome}, {time.perf_counter() - t2:.2f}s); RSS {rss1:.1f} -> {_rss_mib():.1f} MiB")

        t3 = time.perf_counter()
        r = httpx.get(srv.url + "/metrics", timeout=30)
        print(f"afterwards: GET /metrics -> {r.status_code} in {(time.perf_counter() - t3) * 1000:.1f} ms")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
