"""Benchmark of the Kubernetes adapter against the sandbox API server.

    .venv/bin/python -m tests.bench.bench_kube [--workloads 2000] [--namespaces 20] [--patches 50]

Starts ``ratefit sandbox`` in a separate process (so the server's CPU is not counted as
ours) loaded with N INVENTED Deployments (2 containers, 1 replica each) and N
SizingPolicies, then prints, for the adapter in this process:

1. ``list_workloads(Deployment)`` over all namespaces (paged, 500 a page): wall time and
   this process's CPU time (JSON decoding + building ``Workload`` values);
2. the part of that CPU spent turning JSON into ``Workload`` values, per workload
   (measured on the decoded objects, no I/O);
3. ``list_policies()`` wall/CPU;
4. ``patch_cpu`` (server-side dry run + patch): p50/p95 wall per workload;
5. ``list_pods`` for one workload: p50 wall.

The sandbox is a single-process Python stand-in, so the wall times say more about it
than about a real API server; the CPU figures are this process's own. A benchmark,
not a test: nothing is asserted.
"""

from __future__ import annotations

import argparse
import os
import platform
import statistics
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

import yaml

from ratefit.controller.kube import KubeAdapter, workload_from_json
from ratefit.controller.local_servers import stop_process
from ratefit.controller.workload import CpuChange, WorkloadKind
from tests.bench.machine import cpu_model

ROOT = Path(__file__).resolve().parents[2]


def _manifests(n: int, namespaces: int) -> list[dict]:
    docs = []
    for i in range(n):
        ns = f"bench-{i % namespaces:03d}"
        name = f"svc-{i:05d}"
        docs.append({
            "apiVersion": "apps/v1", "kind": "Deployment",
            "metadata": {"name": name, "namespace": ns, "labels": {"app": name}},
            "spec": {"replicas": 1, "selector": {"matchLabels": {"app": name}},
                     "template": {"metadata": {"labels": {"app": name}}, "spec": {"containers": [
                         {"name": "app", "image": "example.invalid/app:1",
                          "resources": {"requests": {"cpu": "500m", "memory": "256Mi"}, "limits": {"cpu": "1"}}},
                         {"name": "proxy", "image": "example.invalid/proxy:1",
                          "resources": {"requests": {"cpu": "100m"}}}]}}},
        })
        docs.append({
            "apiVersion": "ratefit.dev/v1alpha1", "kind": "SizingPolicy",
            "metadata": {"name": name, "namespace": ns},
            "spec": {"workload": {"kind": "Deployment", "name": name}, "mode": "DryRun",
                     "containers": [{"name": "app", "model": f"{ns}/{name}/app"}]},
        })
    return docs


def _timed(fn):
    w0, c0 = time.perf_counter(), time.process_time()
    out = fn()
    return out, time.perf_counter() - w0, time.process_time() - c0


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--workloads", type=int, default=2000)
    ap.add_argument("--namespaces", type=int, default=20)
    ap.add_argument("--patches", type=int, default=50)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        tmpd = Path(tmp)
        load = tmpd / "objects.yaml"
        load.write_text(yaml.safe_dump_all(_manifests(args.workloads, args.namespaces)))
        kc = tmpd / "kubeconfig"
        t0 = time.perf_counter()
        proc = subprocess.Popen(
            [sys.executable, "-m", "ratefit.controller.cli", "sandbox", "--kubeconfig", str(kc),
             "--load", str(ROOT / "manifests" / "crd"), str(load)],
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)
        try:
            url = proc.stdout.readline().strip() if proc.stdout else ""
            if not url.startswith("http://127.0.0.1:"):
                print("sandbox did not start:", url, proc.stderr.read() if proc.stderr else "", file=sys.stderr)
                return 1
            urllib.request.urlopen(url + "/healthz", timeout=60).read()
            print(f"sandbox up with {args.workloads} deployments + {args.workloads} policies "
                  f"in {time.perf_counter() - t0:.1f} s", file=sys.stderr)
            kube = KubeAdapter.from_kubeconfig(str(kc), identity="bench")
            print(f"machine: {os.cpu_count()} cores, {cpu_model()}, "
                  f"Python {platform.python_version()}")

            wls, wall, cpu = _timed(lambda: kube.list_workloads(WorkloadKind.DEPLOYMENT))
            print(f"list_workloads: {len(wls)} deployments, wall {wall * 1e3:.0f} ms, "
                  f"client CPU {cpu * 1e3:.0f} ms ({cpu / len(wls) * 1e6:.0f} µs/workload incl. JSON decode)")

            raw = kube._call("bench raw list", kube._apps.list_deployment_for_all_namespaces)
            items = raw["items"]
            reps = 5
            _, _, cpu = _timed(lambda: [workload_from_json(o, WorkloadKind.DEPLOYMENT) for _ in range(reps) for o in items])
            print(f"JSON → Workload alone: {cpu / (reps * len(items)) * 1e6:.1f} µs/workload "
                  f"({cpu / (reps * len(items) * 2) * 1e6:.1f} µs/container)")

            pols, wall, cpu = _timed(kube.list_policies)
            print(f"list_policies: {len(pols.items)} policies, wall {wall * 1e3:.0f} ms, client CPU {cpu * 1e3:.0f} ms")

            lat = []
            for wl in wls[: args.patches]:
                _, wall, _ = _timed(lambda wl=wl: kube.patch_cpu(wl, {"app": CpuChange(400, limit_m=800)}))
                lat.append(wall)
            lat.sort()
            print(f"patch_cpu (dry run + patch) x{len(lat)}: p50 {statistics.median(lat) * 1e3:.1f} ms, "
                  f"p95 {lat[int(0.95 * (len(lat) - 1))] * 1e3:.1f} ms")

            pl = []
            for wl in wls[:20]:
                _, wall, _ = _timed(lambda wl=wl: kube.list_pods(wl))
                pl.append(wall)
            print(f"list_pods x{len(pl)}: p50 {statistics.median(pl) * 1e3:.1f} ms")
            kube.close()
        finally:
            stop_process(proc)
            for s in (proc.stdout, proc.stderr):
                if s:
                    s.close()
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
