"""Benchmark of the sizing API: ``python -m tests.bench.bench_api`` (from the repo root).

Starts a real ``ratefit serve`` (uvicorn, one process, access log on at info level as in
production) on 127.0.0.1 with 10,000 models loaded and prints:

1. single lookups: p50/p99 of ``GET …/demand?rate=R`` beside ``GET /healthz`` on the
   same server (the framework's floor), at a fixed concurrency, end to end and as the
   server measured it (``Server-Timing: app;dur=``). The client is a minimal asyncio
   HTTP/1.1 keep-alive client (raw sockets, no HTTP library) so that its own cost stays
   small; it shares the machine's cores with the server, so end-to-end figures include
   the client's time and the scheduler's. The client's own cost is printed too (the same
   client loop against a canned in-process answer, no server).
2. batches: ``POST /v1/demand`` with 1,000 and 10,000 items: server time and end-to-end
   time (httpx; body pre-encoded; end to end = request sent to answer received, and
   with the answer's JSON parsed).
3. RSS of the server with 10,000 models (``VmRSS``/``VmHWM`` from /proc/<pid>/status).

Goals (issue 3): single p50 within 1.3× of /healthz; 10,000-item batch under 50 ms end
to end; RSS under 300 MB. The demo keys are an invented scenario.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import platform
import random
import statistics
import sys
import tempfile
import time
from pathlib import Path

import httpx

from tests.api_fixtures import demo_keys, make_artifact, serve_process
from ratefit.models.store import ModelStore
from tests.bench.machine import cpu_model

GOALS = {"single_ratio": 1.3, "batch10k_ms": 50.0, "rss_mb": 300.0}


def proc_status(pid: int) -> dict[str, float]:
    out = {}
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        key, _, rest = line.partition(":")
        if key in ("VmRSS", "VmHWM"):
            out[key] = int(rest.split()[0]) / 1024.0  # kB → MiB
    return out


def build_store(root: Path, n: int, *, seed: int = 3) -> list[str]:
    store = ModelStore(root)
    keys = demo_keys(n)
    rnd = random.Random(seed)
    started = time.perf_counter()
    real_fsync = os.fsync
    os.fsync = lambda fd: None  # type: ignore[assignment]  # a throwaway store needs no durability
    try:
        for i, key in enumerate(keys):
            store.save(
                make_artifact(key, slope=rnd.uniform(0.001, 0.01), base=rnd.uniform(0.01, 0.2), rate_hi=rnd.uniform(50, 900))
            )
            if (i + 1) % 2000 == 0:
                print(f"  wrote {i + 1}/{n} artifacts ({time.perf_counter() - started:.1f}s)", file=sys.stderr)
    finally:
        os.fsync = real_fsync  # type: ignore[assignment]
    return keys


# -- a minimal keep-alive HTTP/1.1 client ------------------------------------------------------
async def _read_response(reader: asyncio.StreamReader) -> tuple[int, float, bytes]:
    head = await reader.readuntil(b"\r\n\r\n")
    lines = head.split(b"\r\n")
    status = int(lines[0].split()[1])
    length = 0
    server_ms = float("nan")
    for line in lines[1:]:
        k, _, v = line.partition(b":")
        k = k.strip().lower()
        if k == b"content-length":
            length = int(v)
        elif k == b"server-timing":
            server_ms = float(v.split(b"dur=")[1])
    body = await reader.readexactly(length)
    return status, server_ms, body


async def _worker(port: int, requests: list[bytes], out: list[tuple[float, float]]) -> None:
    reader, writer = await asyncio.open_connection("127.0.0.1", port)
    try:
        for req in requests:
            t0 = time.perf_counter()
            writer.write(req)
            status, server_ms, _ = await _read_response(reader)
            e2e = (time.perf_counter() - t0) * 1000.0
            if status != 200:
                raise RuntimeError(f"HTTP {status} for {req[:80]!r}")
            out.append((e2e, server_ms))
    finally:
        writer.close()


def _request(path: str, token: str | None) -> bytes:
    auth = f"Authorization: Bearer {token}\r\n" if token else ""
    return f"GET {path} HTTP/1.1\r\nHost: 127.0.0.1\r\n{auth}\r\n".encode()


def run_load(port: int, paths: list[str], *, token: str | None, concurrency: int) -> list[tuple[float, float]]:
    per = [paths[i::concurrency] for i in range(concurrency)]
    out: list[tuple[float, float]] = []

    async def main() -> None:
        await asyncio.gather(*(_worker(port, [_request(p, token) for p in chunk], out) for chunk in per))

    asyncio.run(main())
    return out


def client_overhead_ms(n: int = 20000) -> float:
    """The client loop's own cost per request against a canned in-memory answer."""
    answer = (
        b"HTTP/1.1 200 OK\r\ncontent-length: 111\r\ncontent-type: application/json\r\n"
        b"server-timing: app;dur=0.100\r\n\r\n" + b"x" * 111
    )

    async def main() -> float:
        reader = asyncio.StreamReader()
        req = _request("/v1/models/shop/wl-00000/app/demand?rate=1", "t")
        t0 = time.perf_counter()
        for _ in range(n):
            reader.feed_data(answer)
            _ = len(req)
            await _read_response(reader)
        return (time.perf_counter() - t0) * 1000.0 / n

    return asyncio.run(main())


def pct(values: list[float], q: float) -> float:
    s = sorted(values)
    return s[min(len(s) - 1, max(0, int(round(q / 100.0 * (len(s) - 1)))))]


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--models", type=int, default=10_000)
    ap.add_argument("--concurrency", type=int, default=8)
    ap.add_argument("--requests", type=int, default=4000, help="requests per route per round")
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--batch-repeats", type=int, default=30)
    ap.add_argument("--log-level", default="info")
    ap.add_argument("--json", metavar="FILE", help="also write the figures as JSON")
    ap.add_argument("--keep-store", metavar="DIR", help="write the store here once and reuse it on later runs")
    args = ap.parse_args(argv)

    try:
        import httptools  # noqa: F401

        parser = "httptools"
    except ImportError:
        parser = "h11"
    print(
        f"http parser: {parser} (uvicorn picks httptools when installed)"
    )
    print(
        f"machine: nproc={os.cpu_count()} cpu={cpu_model()!r} python={platform.python_version()} "
        f"load average at start={os.getloadavg()[0]:.2f} (the cores are shared: figures move with it)"
    )
    results: dict[str, object] = {"nproc": os.cpu_count(), "cpu": cpu_model(), "models": args.models}
    token = "bench-token"  # invented
    with tempfile.TemporaryDirectory(prefix="ratefit-bench-") as tmp:
        root = Path(args.keep_store) if args.keep_store else Path(tmp) / "store"
        if args.keep_store and len(ModelStore(root).keys()) == args.models:
            keys = ModelStore(root).keys()
        else:
            print(f"writing {args.models} artifacts …", file=sys.stderr)
            keys = build_store(root, args.models)
        t0 = time.perf_counter()
        with serve_process(root, token=token, workdir=tmp, log_level=args.log_level, ready_timeout=300) as srv:
            print(f"server ready with {args.models} models in {time.perf_counter() - t0:.1f}s (pid {srv.pid})")
            mem0 = proc_status(srv.pid)
            rnd = random.Random(5)

            # 1. single lookups beside /healthz, interleaved in rounds to share any drift
            demand_paths = [
                f"/v1/models/{rnd.choice(keys)}/demand?rate={rnd.uniform(0, 1000):.3f}" for _ in range(args.requests)
            ]
            health_paths = ["/healthz"] * args.requests
            # the same lookups with an extra query parameter: they skip the fast path
            # (models/api_fastpath.py) and go through FastAPI's routing and validation
            routed_paths = [p + "&via=fastapi" for p in demand_paths]
            run_load(srv.port, demand_paths[:500] + health_paths[:500], token=token, concurrency=args.concurrency)  # warm-up
            samples: dict[str, list[tuple[float, float]]] = {"healthz": [], "demand": [], "routed": []}
            for _ in range(args.rounds):
                samples["healthz"] += run_load(srv.port, health_paths, token=token, concurrency=args.concurrency)
                samples["demand"] += run_load(srv.port, demand_paths, token=token, concurrency=args.concurrency)
                samples["routed"] += run_load(srv.port, routed_paths, token=token, concurrency=args.concurrency)
            print(f"\nsingle requests, concurrency {args.concurrency}, {args.rounds}×{args.requests} per route (ms):")
            print(f"  {'route':<26}{'e2e p50':>9}{'e2e p99':>9}{'server p50':>12}{'server p99':>12}{'req/s':>9}")
            single: dict[str, dict[str, float]] = {}
            for name, rows in samples.items():
                e2e = [r[0] for r in rows]
                srv_ms = [r[1] for r in rows]
                single[name] = {
                    "e2e_p50": pct(e2e, 50),
                    "e2e_p99": pct(e2e, 99),
                    "server_p50": pct(srv_ms, 50),
                    "server_p99": pct(srv_ms, 99),
                    "throughput": args.concurrency * 1000.0 / statistics.mean(e2e),
                }
                s = single[name]
                label = {
                    "healthz": "GET /healthz",
                    "demand": "GET …/demand?rate=R",
                    "routed": "  same via FastAPI route",
                }[name]
                print(
                    f"  {label:<26}{s['e2e_p50']:>9.3f}{s['e2e_p99']:>9.3f}{s['server_p50']:>12.3f}"
                    f"{s['server_p99']:>12.3f}{s['throughput']:>9.0f}"
                )
            ratio = single["demand"]["e2e_p50"] / single["healthz"]["e2e_p50"]
            ratio_srv = single["demand"]["server_p50"] / single["healthz"]["server_p50"]
            ratio_routed = single["routed"]["e2e_p50"] / single["healthz"]["e2e_p50"]
            overhead = client_overhead_ms()
            print(f"  p50 ratio demand/healthz: {ratio:.2f}× end to end, {ratio_srv:.2f}× server time (goal ≤ 1.3×)")
            print(f"  without the fast path (FastAPI route): {ratio_routed:.2f}× end to end")
            print(f"  client's own cost per request (canned answer, no server): {overhead:.3f} ms")
            results["single"] = single
            results["single_ratio_p50"] = ratio
            results["single_ratio_server_p50"] = ratio_srv
            results["single_ratio_routed_p50"] = ratio_routed
            results["client_overhead_ms"] = overhead

            # 2. batches
            print(f"\nPOST /v1/demand, {args.batch_repeats} runs each (ms):")
            print(f"  {'items':<8}{'server p50':>11}{'e2e p50':>9}{'e2e p99':>9}{'+parse p50':>11}{'body in':>10}{'body out':>10}")
            batch_res: dict[str, dict[str, float]] = {}
            with httpx.Client(base_url=srv.base_url, headers=srv.headers, timeout=60) as c:
                for n in (1_000, 10_000):
                    items = [{"model": rnd.choice(keys), "rate": round(rnd.uniform(0, 1000), 3)} for _ in range(n)]
                    body = json.dumps({"items": items}).encode()
                    hdr = {"content-type": "application/json"}
                    for _ in range(3):  # warm-up
                        c.post("/v1/demand", content=body, headers=hdr)
                    e2e, parsed, server = [], [], []
                    size_out = 0
                    for _ in range(args.batch_repeats):
                        t1 = time.perf_counter()
                        r = c.post("/v1/demand", content=body, headers=hdr)
                        t2 = time.perf_counter()
                        out = r.json()
                        t3 = time.perf_counter()
                        assert r.status_code == 200 and len(out["items"]) == n
                        e2e.append((t2 - t1) * 1000.0)
                        parsed.append((t3 - t1) * 1000.0)
                        server.append(float(r.headers["server-timing"].split("dur=")[1]))
                        size_out = len(r.content)
                    batch_res[str(n)] = {
                        "server_p50": pct(server, 50),
                        "e2e_p50": pct(e2e, 50),
                        "e2e_p99": pct(e2e, 99),
                        "e2e_parsed_p50": pct(parsed, 50),
                        "bytes_in": len(body),
                        "bytes_out": size_out,
                    }
                    b = batch_res[str(n)]
                    print(
                        f"  {n:<8}{b['server_p50']:>11.2f}{b['e2e_p50']:>9.2f}{b['e2e_p99']:>9.2f}"
                        f"{b['e2e_parsed_p50']:>11.2f}{len(body) / 1e3:>9.0f}k{size_out / 1e3:>9.0f}k"
                    )
            results["batch"] = batch_res

            # 3. reloads of the whole store: unchanged, then with every artifact rewritten
            #    (old and new snapshot both alive at the swap: the peak RSS below)
            mem_before_reload = proc_status(srv.pid)
            with httpx.Client(base_url=srv.base_url, headers=srv.headers, timeout=300) as c:
                t4 = time.perf_counter()
                rep = c.post("/v1/reload").json()
                same_s = time.perf_counter() - t4
                print(f"\nPOST /v1/reload of {rep['model_count']} models, nothing changed: {same_s:.2f} s")
                print("rewriting every artifact …", file=sys.stderr)
                build_store(root, args.models, seed=time.time_ns())
                t5 = time.perf_counter()
                rep = c.post("/v1/reload").json()
                changed_s = time.perf_counter() - t5
                print(f"POST /v1/reload with all {rep['changed']} models changed: {changed_s:.2f} s")
                assert rep["ok"] and rep["changed"] == args.models, rep
            results["reload_unchanged_seconds"] = same_s
            results["reload_changed_seconds"] = changed_s

            # 4. memory
            mem1 = proc_status(srv.pid)
            print(
                f"\nRSS with {args.models} models: {mem0['VmRSS']:.0f} MiB after load, "
                f"{mem_before_reload['VmRSS']:.0f} MiB after the requests (peak {mem_before_reload['VmHWM']:.0f}), "
                f"{mem1['VmRSS']:.0f} MiB after the reloads, peak {mem1['VmHWM']:.0f} MiB "
                "(the peak includes the swap with two snapshots alive; goal < 300 MB)"
            )
            results["rss_mib_before_reload"] = mem_before_reload["VmRSS"]
            results["rss_mib_peak_before_reload"] = mem_before_reload["VmHWM"]
            results["rss_mib_loaded"] = mem0["VmRSS"]
            results["rss_mib_after"] = mem1["VmRSS"]
            results["rss_mib_peak"] = mem1["VmHWM"]

    print(f"load average at the end: {os.getloadavg()[0]:.2f}")
    results["loadavg_end"] = os.getloadavg()[0]
    ok = {
        "single p50 ≤ 1.3× healthz": ratio <= GOALS["single_ratio"],
        "10k batch < 50 ms e2e": batch_res["10000"]["e2e_p50"] < GOALS["batch10k_ms"],
        "RSS < 300 MB": results["rss_mib_before_reload"] * 1.048576 < GOALS["rss_mb"],  # type: ignore[operator]
    }
    print("\ngoals: " + ", ".join(f"{k}: {'met' if v else 'MISSED'}" for k, v in ok.items()))
    results["goals"] = ok
    if args.json:
        Path(args.json).write_text(json.dumps(results, indent=1) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
