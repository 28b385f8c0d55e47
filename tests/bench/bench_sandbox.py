"""Benchmark of the sandbox API server itself (in-process, over loopback HTTP).

    .venv/bin/python -m tests.bench.bench_sandbox [--deployments 1000] [--ops 300]

Prints, with the official `kubernetes` client as the caller:
1. loading N INVENTED Deployments (1 replica: Deployment + ReplicaSet + Pod each) through
   the in-process API (`SandboxServer.create`): total and per Deployment;
2. GET of one Deployment, strategic-merge PATCH of one container's CPU request (each
   a template change: new ReplicaSet and pod), `dryRun=All` PATCH: p50/p95 per request;
3. LIST of all Deployments (paged 500 a page);
4. watch latency: from sending a PATCH to its MODIFIED event arriving on an open watch.

Client and server share this process and its GIL, so these figures bound what tests
can expect from the stand-in; they say nothing about a real API server. A benchmark,
not a test: nothing is asserted.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import threading
import time

from kubernetes import client

from ratefit.controller.sandbox.server import SandboxServer
from tests.bench.machine import cpu_model


def _deployment(i: int) -> dict:
    name = f"svc-{i:05d}"
    return {"apiVersion": "apps/v1", "kind": "Deployment",
            "metadata": {"name": name, "namespace": f"bench-{i % 20:02d}", "labels": {"app": name}},
            "spec": {"replicas": 1, "selector": {"matchLabels": {"app": name}},
                     "template": {"metadata": {"labels": {"app": name}}, "spec": {"containers": [
                         {"name": "app", "image": "registry.example/app:1",
                          "resources": {"requests": {"cpu": "500m", "memory": "256Mi"},
                                        "limits": {"cpu": "2"}}},
                         {"name": "proxy", "image": "registry.example/proxy:1",
                          "resources": {"requests": {"cpu": "100m"}}}]}}}}


def _pct(xs: list[float], q: float) -> float:
    xs = sorted(xs)
    return xs[min(len(xs) - 1, int(q * len(xs)))]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--deployments", type=int, default=1000)
    ap.add_argument("--ops", type=int, default=300)
    args = ap.parse_args()
    cpu = cpu_model()
    print(f"machine: {os.cpu_count()} cores ({cpu}), Python {platform.python_version()}")
    with SandboxServer(history=5000) as sb:
        t0 = time.perf_counter()
        for i in range(args.deployments):
            sb.create(_deployment(i))
        load = time.perf_counter() - t0
        print(f"load {args.deployments} deployments (+RS +pod each): {load:.2f} s, "
              f"{load / args.deployments * 1e3:.2f} ms/deployment")
        api = sb.api_client()
        apps = client.AppsV1Api(api)
        ns, name = "bench-00", "svc-00000"
        apps.read_namespaced_deployment(name, ns)   # warm-up (client lazy imports)

        def timed(fn) -> list[float]:
            out = []
            for i in range(args.ops):
                t = time.perf_counter()
                fn(i)
                out.append(time.perf_counter() - t)
            return out

        def patch(i: int, **kw) -> None:
            apps.patch_namespaced_deployment(name, ns, {"spec": {"template": {"spec": {
                "containers": [{"name": "app", "resources": {"requests": {
                    "cpu": f"{300 + i % 500}m"}}}]}}}}, **kw)

        for label, fn in (("GET deployment", lambda i: apps.read_namespaced_deployment(name, ns)),
                          ("PATCH strategic (rolls a pod)", patch),
                          ("PATCH dryRun=All", lambda i: patch(i, dry_run="All"))):
            lat = timed(fn)
            print(f"{label}: p50 {statistics.median(lat) * 1e3:.2f} ms, "
                  f"p95 {_pct(lat, 0.95) * 1e3:.2f} ms (x{len(lat)})")
        t = time.perf_counter()
        total, cont = 0, None
        while True:
            page = apps.list_deployment_for_all_namespaces(limit=500, _continue=cont)
            total += len(page.items)
            cont = page.metadata._continue
            if not cont:
                break
        print(f"LIST all deployments ({total}, 500 a page): {(time.perf_counter() - t) * 1e3:.0f} ms")

        rv = apps.read_namespaced_deployment(name, ns).metadata.resource_version
        resp = apps.list_namespaced_deployment(ns, watch=True, resource_version=rv,
                                               field_selector=f"metadata.name={name}",
                                               timeout_seconds=60, _preload_content=False)
        arrived: list[float] = []
        done = threading.Event()

        def reader() -> None:
            try:
                for line in resp:   # urllib3 response iterates lines of the stream
                    if line.strip() and json.loads(line).get("type") == "MODIFIED":
                        arrived.append(time.perf_counter())
                    if done.is_set():
                        break
            except (AttributeError, OSError, ValueError):   # closed under us at the end
                pass

        th = threading.Thread(target=reader, daemon=True)
        th.start()
        lats = []
        for i in range(min(args.ops, 100)):
            n = len(arrived)
            t = time.perf_counter()
            apps.patch_namespaced_deployment(name, ns, {"metadata": {"labels": {"i": str(i)}}})
            while len(arrived) == n and time.perf_counter() - t < 2:
                time.sleep(0.0002)
            if len(arrived) > n:
                lats.append(max(0.0, arrived[-1] - t))
        done.set()
        resp.close()
        if lats:
            print(f"watch: PATCH sent -> MODIFIED received: p50 "
                  f"{statistics.median(lats) * 1e3:.2f} ms, p95 {_pct(lats, 0.95) * 1e3:.2f} ms "
                  f"(x{len(lats)})")
        api.close()


if __name__ == "__main__":
    main()
