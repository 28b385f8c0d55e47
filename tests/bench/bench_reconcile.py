"""Benchmark: one reconcile pass over 10,000 workloads (20,000 containers).

    python -m tests.bench.bench_reconcile [--workloads 10000] [--namespaces 20] [--writes]

Real parts, each in its own process so the controller's figures are its own:
- the sandbox API server (a child process) holding the SizingPolicy CRD, N Deployments
  with two containers each (replicas 0: no pods — rollout-method passes never list
  pods) and N SizingPolicies;
- the real Prometheus with a backfilled history of one request counter per workload
  (INVENTED benchmark scenario, constant per-pod rates);
- a real `ratefit serve` over N linear curves (container `side` uses the model of `app`
  of its workload, so the store holds N models and the batch holds 2N items);
- the controller: a child process that builds the Reconciler from the real adapters and
  runs passes, measuring wall time, its own CPU time (time.process_time), the CPU spent
  outside I/O (decide + bookkeeping, from the pass's phase timings) and its peak RSS.

The pass lists policies once (cluster-wide, paged) and Deployments once (cluster-wide,
paged) rather than reading per policy, sends ONE grouped PromQL query and ONE batched
sizing call (split into the server's chunks). Default: a read-only dry-run pass (what
`ratefit plan` does). ``--writes`` adds the first writing dry-run pass (a status write and
an Event per policy) and the steady-state pass after it (nothing to write).

Goals (issue 5): < 10 s wall, < 100 µs controller CPU per container outside I/O, < 500 MB RSS.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from tests.bench.machine import cpu_model

ROOT = Path(__file__).resolve().parents[2]
CRD = ROOT / "manifests" / "crd" / "sizingpolicy.yaml"
METRIC = "bench_http_requests_total"


def _names(n: int, n_ns: int) -> list[tuple[str, str]]:
    return [(f"bench-{i % n_ns:02d}", f"wl-{i:05d}") for i in range(n)]


def _rate(i: int) -> float:
    return 10.0 + (i % 90)


# ---------------------------------------------------------------- child: the sandbox
def child_sandbox(work: Path, n: int, n_ns: int) -> None:
    from ratefit.controller.sandbox import SandboxServer

    t0 = time.perf_counter()
    sb = SandboxServer(host="127.0.0.1", port=0, load=[CRD]).start()
    for i, (ns, wl) in enumerate(_names(n, n_ns)):
        sb.create({"apiVersion": "apps/v1", "kind": "Deployment", "metadata": {"name": wl, "namespace": ns},
                   "spec": {"replicas": 0, "selector": {"matchLabels": {"app": wl}},
                            "template": {"metadata": {"labels": {"app": wl}}, "spec": {"containers": [
                                {"name": "app", "image": "registry.invalid/bench:1",
                                 "resources": {"requests": {"cpu": "1000m"}, "limits": {"cpu": "2000m"}}},
                                {"name": "side", "image": "registry.invalid/side:1",
                                 "resources": {"requests": {"cpu": "100m"}}}]}}}})
        sb.create({"apiVersion": "ratefit.dev/v1alpha1", "kind": "SizingPolicy",
                   "metadata": {"name": wl, "namespace": ns},
                   "spec": {"workload": {"kind": "Deployment", "name": wl}, "mode": "DryRun", "settle": "0s",
                            "containers": [{"name": "app", "model": f"{ns}/{wl}/app"},
                                           {"name": "side", "model": f"{ns}/{wl}/app"}]}})
    sb.write_kubeconfig(work / "kubeconfig")
    print(json.dumps({"ready": True, "load_s": time.perf_counter() - t0}), flush=True)
    sys.stdin.read()  # until the parent closes our stdin
    sb.stop()


# ---------------------------------------------------------------- child: the controller
def child_pass(args: argparse.Namespace) -> None:
    from ratefit.controller.kube import KubeAdapter
    from ratefit.controller.metrics_source import PrometheusRateSource, RateTemplate
    from ratefit.controller.reconcile import ReconcileConfig, Reconciler
    from ratefit.controller.review import to_json
    from ratefit.controller.sizing_client import SizingClient
    from ratefit.models.prometheus import PrometheusClient

    kube = KubeAdapter.from_kubeconfig(args.kubeconfig, identity="bench")
    prom = PrometheusClient(args.prometheus, timeout=120.0)
    rates = PrometheusRateSource(prom, at=args.at, template=RateTemplate(metric=METRIC))
    sizing = SizingClient(args.sizing_api, timeout=120.0)
    out = []

    def one(label: str, write: bool) -> None:
        rec = Reconciler(kube=kube, rates=rates, sizing=sizing, config=ReconcileConfig(dry_run=True, write=write))
        w0, c0 = time.perf_counter(), time.process_time()
        r = rec.run_pass()
        wall, cpu = time.perf_counter() - w0, time.process_time() - c0
        t1 = time.process_time()
        review = to_json(r.rows)  # what `ratefit plan -o json` prints
        review_cpu = time.process_time() - t1
        containers = len(r.rows)
        verdicts: dict[str, int] = {}
        for row in r.rows:
            verdicts[row.verdict] = verdicts.get(row.verdict, 0) + 1
        ph = dict(r.phases)
        pure = ph.get("decide_cpu", 0.0) + (ph.get("act_cpu", 0.0) if not write else 0.0)
        out.append({
            "pass": label, "outcome": r.outcome.value, "policies": r.policies, "containers": containers,
            "verdicts": verdicts, "status_writes": r.status_writes, "events": r.events, "errors": list(r.errors)[:3],
            "wall_s": round(wall, 3), "cpu_s": round(cpu, 3),
            "phases": {k: round(v, 3) for k, v in ph.items()},
            "cpu_outside_io_us_per_container": round(1e6 * pure / max(1, containers), 1),
            "review_json_cpu_s": round(review_cpu, 3), "review_bytes": len(review),
            "prom_queries": rates.queries_sent,
        })

    one("read-only dry-run (plan)", False)
    if args.writes:
        one("first writing dry-run (status + Events)", True)
        one("steady-state writing dry-run", True)
    print(json.dumps({"passes": out, "rss_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1)}))
    kube.close()
    prom.close()
    sizing.close()


# ---------------------------------------------------------------- parent: set-up and report
def write_history(path: Path, n: int, n_ns: int, *, end: float, minutes: int = 70, step_s: int = 60) -> None:
    start = end - minutes * 60
    ts = [start + k * step_s for k in range(minutes * 60 // step_s + 1)]
    with open(path, "w") as f:
        f.write(f"# HELP {METRIC[:-6]} Requests (INVENTED benchmark scenario).\n# TYPE {METRIC[:-6]} counter\n")
        for i, (ns, wl) in enumerate(_names(n, n_ns)):
            r = _rate(i)
            # named as a Deployment's pod is (<name>-<template hash>-<5>, controller/pod_names):
            # the controller maps pods to workloads by name (a pod "wl-0" would be NoMetrics)
            lab = f'namespace="{ns}",pod="{wl}-5d4c7b9f8-bcdfg",workload="{wl}"'
            f.write("".join(f"{METRIC}{{{lab}}} {r * (t - start):.3f} {t:.0f}\n" for t in ts))
        f.write("# EOF\n")


def write_store(root: Path, n: int, n_ns: int) -> None:
    sys.path.insert(0, str(ROOT / "tests"))
    from api_fixtures import make_artifact

    from ratefit.models.store import ModelStore

    store = ModelStore(root)
    for i, (ns, wl) in enumerate(_names(n, n_ns)):
        store.save(make_artifact(f"{ns}/{wl}/app", slope=0.002 + 0.00001 * (i % 50)))


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--workloads", type=int, default=10_000)
    ap.add_argument("--namespaces", type=int, default=20)
    ap.add_argument("--writes", action="store_true", help="also measure the first writing pass and the steady state")
    ap.add_argument("--child-sandbox", metavar="DIR", help=argparse.SUPPRESS)
    ap.add_argument("--child-pass", action="store_true", help=argparse.SUPPRESS)
    ap.add_argument("--kubeconfig", help=argparse.SUPPRESS)
    ap.add_argument("--prometheus", help=argparse.SUPPRESS)
    ap.add_argument("--sizing-api", help=argparse.SUPPRESS)
    ap.add_argument("--at", type=float, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child_sandbox:
        child_sandbox(Path(args.child_sandbox), args.workloads, args.namespaces)
        return 0
    if args.child_pass:
        child_pass(args)
        return 0

    from ratefit.controller.demo import start_prometheus, start_serve

    n, n_ns = args.workloads, args.namespaces
    print(f"bench_reconcile: {n} workloads ({2 * n} containers) in {n_ns} namespaces; nproc {os.cpu_count()}, CPU {cpu_model()}",
          file=sys.stderr)
    with tempfile.TemporaryDirectory(prefix="ratefit-bench-") as tmp, contextlib.ExitStack() as stack:
        work = Path(tmp)
        t = time.perf_counter()
        end = float(int(time.time() // 60 * 60 - 300))
        write_history(work / "history.om", n, n_ns, end=end)
        print(f"  history written in {time.perf_counter() - t:.1f}s", file=sys.stderr)
        t = time.perf_counter()
        prom_url = stack.enter_context(start_prometheus(work / "history.om", work, timeout=120))
        print(f"  Prometheus backfilled and ready in {time.perf_counter() - t:.1f}s", file=sys.stderr)
        t = time.perf_counter()
        write_store(work / "store", n, n_ns)
        api_url = stack.enter_context(start_serve(work / "store", work, timeout=300))
        print(f"  {n} models stored and served in {time.perf_counter() - t:.1f}s", file=sys.stderr)
        t = time.perf_counter()
        sb = subprocess.Popen([sys.executable, "-m", "tests.bench.bench_reconcile", "--child-sandbox", str(work),
                               "--workloads", str(n), "--namespaces", str(n_ns)],
                              stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True, cwd=ROOT)

        def stop_sandbox() -> None:
            with contextlib.suppress(Exception):
                sb.stdin.close()
            try:
                sb.wait(timeout=30)
            except subprocess.TimeoutExpired:
                sb.kill()
                sb.wait()

        stack.callback(stop_sandbox)
        line = sb.stdout.readline()
        if not line:
            raise SystemExit("the sandbox child did not start")
        print(f"  sandbox loaded ({2 * n} objects) in {time.perf_counter() - t:.1f}s", file=sys.stderr)
        cmd = [sys.executable, "-m", "tests.bench.bench_reconcile", "--child-pass", "--kubeconfig", str(work / "kubeconfig"),
               "--prometheus", prom_url, "--sizing-api", api_url, "--at", str(end)] + (["--writes"] if args.writes else [])
        p = subprocess.run(cmd, capture_output=True, text=True, cwd=ROOT, timeout=1800)
        if p.returncode != 0:
            print(p.stderr[-3000:], file=sys.stderr)
            return 1
        res = json.loads(p.stdout.strip().splitlines()[-1])
    print(f"\nratefit reconcile benchmark — nproc {os.cpu_count()}, {cpu_model()}, Python {platform.python_version()}")
    print(f"{n} workloads, {2 * n} containers; controller peak RSS {res['rss_mb']} MB (goal < 500 MB)")
    for ps in res["passes"]:
        ph = ps["phases"]
        print(f"\n{ps['pass']}: {ps['outcome']}, {ps['containers']} containers {ps['verdicts']}, "
              f"{ps['status_writes']} status writes, {ps['events']} events, {ps['prom_queries']} PromQL queries so far")
        print(f"  wall {ps['wall_s']:.2f} s (goal < 10 s): gather {ph.get('gather', 0):.2f} s "
              f"[Kubernetes LISTs {ph.get('gather_kube', 0):.2f} s, one PromQL query {ph.get('gather_rates', 0):.2f} s "
              f"(alongside the LISTs; waited {ph.get('gather_rates_wait', 0):.2f} s more), "
              f"batched sizing call {ph.get('gather_sizing', 0):.2f} s], decide {ph.get('decide', 0):.3f} s, act {ph.get('act', 0):.2f} s")
        print(f"  controller CPU {ps['cpu_s']:.2f} s: gather {ph.get('gather_cpu', 0):.2f} s (JSON decoding, client), "
              f"decide {ph.get('decide_cpu', 0):.3f} s, act {ph.get('act_cpu', 0):.3f} s")
        share = ps["cpu_outside_io_us_per_container"] * ps["containers"] / 1e6 / max(ps["cpu_s"], 1e-9)
        print(f"  CPU outside I/O (decide + bookkeeping): {ps['cpu_outside_io_us_per_container']} µs per container "
              f"(goal < 100 µs), {100 * share:.0f}% of the controller's CPU; the rest is I/O (HTTP, JSON)")
        print(f"  review as JSON: {ps['review_json_cpu_s']:.2f} s CPU, {ps['review_bytes'] / 1e6:.1f} MB")
        if ps["errors"]:
            print(f"  errors: {ps['errors']}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
