"""Benchmark: `ratefit run` passes over 10,000 workloads (20,000 containers) read from the
watch-fed cache (controller/kube_cache.py).

    python -m tests.bench.bench_cache [--workloads 10000] [--namespaces 20] [--no-writes] [--profile]

The same real parts as tests/bench/bench_reconcile.py (its set-up is reused): the
sandbox API server in a child process with N Deployments (two containers, replicas 0)
and N SizingPolicies (INVENTED benchmark scenario), the real Prometheus on a backfilled
history, a real `ratefit serve` over N curves. The controller is another child process
that builds what `ratefit run --dry-run` builds (adapter, KubeCache, CachedKube,
Reconciler) and measures:

1. cold start: the cache's first sync (paged LISTs of policies, Deployments,
   StatefulSets, HPAs, then watches) — wall time, and the process's RSS before and after
   (the cache's memory);
2. the first pass on the fresh cache (a writing dry-run: one status write and Events per
   policy, as `ratefit run` does the first time; ``--no-writes``: a read-only pass);
3. the steady-state pass: nothing changed since, the watches have delivered our own
   writes; wall time, phases, and the API requests the sandbox served during the pass
   (its request log: LIST / WATCH / GET / writes), PromQL queries and sizing calls;
4. ``--profile``: one more steady-state pass under cProfile, the top functions by
   cumulative and by own time (where the pass spends its time, for whoever acts on it).

Goals (issue 8): steady-state pass ≤ 1.0 s wall on 2 cores with no LIST; controller RSS
with the cache at 10,000 workloads ≤ 300 MB. A benchmark, not a test: nothing is asserted.
"""

from __future__ import annotations

import argparse
import contextlib
import cProfile
import io
import json
import os
import platform
import pstats
import resource
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

from tests.bench.bench_reconcile import METRIC, ROOT, write_history, write_store
from tests.bench.machine import cpu_model


def _rss_mb() -> float:
    with open("/proc/self/status", encoding="ascii") as fh:
        for line in fh:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024.0
    return 0.0


def _served(sandbox_url: str, t0: float, t1: float) -> dict[str, int]:
    """The requests the sandbox served between t0 and t1 (its log keeps the last 2000), by kind."""
    with urllib.request.urlopen(sandbox_url + "/_sandbox/requests", timeout=60) as resp:
        log = json.loads(resp.read())["requests"]
    out = {"LIST": 0, "WATCH": 0, "GET": 0, "write": 0}
    for r in log:
        if not t0 <= r["time"] <= t1:
            continue
        if r["method"] != "GET":
            out["write"] += 1
        elif r["query"].get("watch") == "true":
            out["WATCH"] += 1
        elif "limit" in r["query"] or r["path"].endswith(("deployments", "statefulsets", "sizingpolicies",
                                                             "horizontalpodautoscalers", "pods")):
            out["LIST"] += 1
        else:
            out["GET"] += 1
    return out


class _Scaled:
    """A rate source answering what ``source`` answers times ``factor`` (moved rates)."""

    def __init__(self, source, factor: float) -> None:  # type: ignore[no-untyped-def]
        self.source, self.factor = source, factor

    def per_pod_rates(self, requests):  # type: ignore[no-untyped-def]
        import dataclasses

        got = self.source.per_pod_rates(requests)
        return {k: r if r.rate is None else dataclasses.replace(
                    r, rate=r.rate * self.factor, pod_rates={p: v * self.factor for p, v in r.pod_rates.items()})
                for k, r in got.items()}


# ---------------------------------------------------------------- child: the controller
def child_cache(args: argparse.Namespace) -> None:
    import gc

    from ratefit.controller.kube import KubeAdapter
    from ratefit.controller.kube_cache import CachedKube, KubeCache
    from ratefit.controller.metrics_source import PrometheusRateSource, RateTemplate
    from ratefit.controller.reconcile import ReconcileConfig, Reconciler
    from ratefit.controller.sizing_client import SizingClient
    from ratefit.models.prometheus import PrometheusClient

    kube = KubeAdapter.from_kubeconfig(args.kubeconfig, identity="bench")
    sandbox_url = kube.api_client.configuration.host.rstrip("/")
    prom = PrometheusClient(args.prometheus, timeout=120.0)
    rates = PrometheusRateSource(prom, at=args.at, template=RateTemplate(metric=METRIC))
    sizing = SizingClient(args.sizing_api, timeout=120.0)
    calls = {"sizing": 0}
    batch = sizing.demand_batch

    def counted(items, *a, **kw):  # type: ignore[no-untyped-def]
        calls["sizing"] += 1
        return batch(items, *a, **kw)

    sizing.demand_batch = counted  # type: ignore[method-assign]
    gc.collect()
    rss_before = _rss_mb()
    cache = KubeCache.for_adapter(kube)
    t0 = time.perf_counter()
    tw0 = time.time()
    cache.start()
    synced = cache.wait_synced(1800)
    sync_s = time.perf_counter() - t0
    sync_requests = _served(sandbox_url, tw0, time.time())
    gc.collect()
    rss_synced = _rss_mb()
    objects = {r: s.objects for r, s in cache.stats().per_resource.items()}
    snapshot = None
    source = rates
    if args.rate_refresh > 0:  # what `ratefit run` builds with a rate refresh period
        from ratefit.controller.rates_snapshot import RateSnapshot

        snapshot = source = RateSnapshot(rates, period_s=args.rate_refresh)
    rec = Reconciler(kube=CachedKube(reader=cache, writer=kube), rates=source, sizing=sizing,
                     config=ReconcileConfig(dry_run=True, write=args.writes, identity="bench",
                                            reuse_unchanged=not args.no_reuse,
                                            status_figures_every_s=args.status_figures_every))
    out = []

    def one(label: str) -> None:
        q0, s0, d0 = rates.queries_sent, calls["sizing"], rec.writer.deferred
        r0 = snapshot.refreshes if snapshot is not None else 0
        tw, w0, c0 = time.time(), time.perf_counter(), time.process_time()
        r = rec.run_pass()
        wall, cpu = time.perf_counter() - w0, time.process_time() - c0
        served = _served(sandbox_url, tw, time.time())
        out.append({
            "pass": label, "outcome": r.outcome.value, "containers": len(r.rows), "status_writes": r.status_writes,
            "events": r.events, "errors": list(r.errors)[:3], "wall_s": round(wall, 3), "cpu_s": round(cpu, 3),
            "phases": {k: round(v, 3) for k, v in dict(r.phases).items()}, "kube_requests": served,
            "prom_queries": rates.queries_sent - q0, "sizing_calls": calls["sizing"] - s0,
            "sizing_items": rec.observer.sizing_asked, "deferred_writes": rec.writer.deferred - d0,
            "rates_from_snapshot": snapshot.hits if snapshot is not None else 0,
            "refresh_overlapped": (snapshot.refreshes - r0) if snapshot is not None else 0,
        })

    one("first pass on the fresh cache" + (" (writes every status + Events)" if args.writes else " (read-only)"))
    if snapshot is not None:
        snapshot.start()
    # let the watches deliver our own writes, then wait until nothing more arrives
    events = -1
    settle0 = time.perf_counter()
    while True:
        time.sleep(2.0)
        now = cache.stats().total("events")
        if now == events or time.perf_counter() - settle0 > 600:
            break
        events = now
    if snapshot is not None:
        # the refresh the thread makes every period (30 s): in a live controller with 1-minute
        # passes the snapshot is never older than that; after the long first pass above it
        # may be (answers older than 3 periods are asked in the pass)
        snapshot.refresh()
    one("steady state (nothing changed)")
    one("steady state, again")
    gc.collect()
    rss_steady = _rss_mb()
    # the cache's own share: the read calls a pass makes, alone
    from ratefit.controller.workload import WorkloadKind

    t = time.perf_counter()
    for _ in range(5):
        cache.list_policies()
        cache.list_workloads(WorkloadKind.DEPLOYMENT)
        cache.list_workloads(WorkloadKind.STATEFULSET)
        cache.list_hpas()
    reads_ms = (time.perf_counter() - t) / 5 * 1e3
    refresh = {}
    if snapshot is not None:  # the refresh's own cost, alone (the thread is stopped first)
        snapshot.stop()
        t, c = time.perf_counter(), time.process_time()
        snapshot.refresh()
        refresh = {"wall_s": round(time.perf_counter() - t, 3), "cpu_s": round(time.process_time() - c, 3),
                   "period_s": snapshot.period_s, "refreshes_during_run": snapshot.refreshes - 1}
        one("steady state right after a refresh (same rates)")
        # every rate moves: the refresh answers from Prometheus scaled, as if traffic had grown
        # everywhere at once (the worst case for the steady-state reuse: no policy's inputs are
        # unchanged, every one is decided again). +2 %: a drift inside the deadband (statuses
        # change only where a demand figure they show moved); +15 %: proposals move too
        for factor in (1.02, 1.15):
            snapshot.source = _Scaled(rates, factor)
            snapshot.refresh()
            one(f"right after a refresh that moved every rate (+{round(factor * 100 - 100)} %)")
        one("steady state after the moved rates")
    profile = ""
    if args.profile:
        prof = cProfile.Profile()
        prof.enable()
        rec.run_pass()
        prof.disable()
        buf = io.StringIO()
        st = pstats.Stats(prof, stream=buf)
        st.sort_stats("cumulative").print_stats(25)
        st.sort_stats("tottime").print_stats(20)
        profile = buf.getvalue()
    gc.collect()
    stats = cache.stats()
    print(json.dumps({
        "synced": synced, "sync_s": round(sync_s, 2), "sync_requests": sync_requests, "objects": objects,
        "rss_before_mb": round(rss_before, 1), "rss_synced_mb": round(rss_synced, 1), "rss_end_mb": round(_rss_mb(), 1), "rss_steady_mb": round(rss_steady, 1),
        "peak_rss_mb": round(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024, 1),
        "cache_reads_ms": round(reads_ms, 1), "refresh": refresh, "relists": stats.total("relists"), "watch_events": stats.total("events"), "passes": out, "profile": profile,
    }))
    cache.stop()
    kube.close()
    prom.close()
    sizing.close()


# ---------------------------------------------------------------- parent: set-up and report
def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--workloads", type=int, default=10_000)
    ap.add_argument("--namespaces", type=int, default=20)
    ap.add_argument("--no-writes", dest="writes", action="store_false",
                    help="read-only passes (no status writes); quicker, same reads")
    ap.add_argument("--profile", action="store_true", help="also profile one steady-state pass (cProfile)")
    ap.add_argument("--rate-refresh", type=float, default=30.0, metavar="SECONDS",
                    help="read the rates from a snapshot refreshed every SECONDS by its own thread "
                         "(controller/rates_snapshot.py); 0: ask Prometheus in every pass (default %(default)s)")
    ap.add_argument("--no-reuse", action="store_true",
                    help="decide every policy every pass (no steady-state memo, controller/stages/steady.py)")
    ap.add_argument("--status-figures-every", type=float, default=300.0, metavar="SECONDS",
                    help="write a status whose only news is figures at most every SECONDS per policy, as "
                         "`ratefit run` does (controller/stages/write.py); 0: at once (default %(default)s)")
    ap.add_argument("--child-cache", action="store_true", help=argparse.SUPPRESS)
    ap.add_argument("--kubeconfig", help=argparse.SUPPRESS)
    ap.add_argument("--prometheus", help=argparse.SUPPRESS)
    ap.add_argument("--sizing-api", help=argparse.SUPPRESS)
    ap.add_argument("--at", type=float, help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.child_cache:
        child_cache(args)
        return 0

    from ratefit.controller.local_servers import stop_process
    from ratefit.controller.demo import start_prometheus, start_serve

    n, n_ns = args.workloads, args.namespaces
    print(f"bench_cache: {n} workloads ({2 * n} containers) in {n_ns} namespaces; nproc {os.cpu_count()}, "
          f"CPU {cpu_model()}", file=sys.stderr)
    with tempfile.TemporaryDirectory(prefix="ratefit-bench-") as tmp, contextlib.ExitStack() as stack:
        work = Path(tmp)
        t = time.perf_counter()
        end = float(int(time.time() // 60 * 60 - 300))
        write_history(work / "history.om", n, n_ns, end=end)
        prom_url = stack.enter_context(start_prometheus(work / "history.om", work, timeout=120))
        write_store(work / "store", n, n_ns)
        api_url = stack.enter_context(start_serve(work / "store", work, timeout=300))
        print(f"  Prometheus and {n} models ready in {time.perf_counter() - t:.1f}s", file=sys.stderr)
        t = time.perf_counter()
        sb = subprocess.Popen([sys.executable, "-m", "tests.bench.bench_reconcile", "--child-sandbox", str(work),
                               "--workloads", str(n), "--namespaces", str(n_ns)],
                              stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True, cwd=ROOT,
                              start_new_session=True)

        def stop_sandbox() -> None:
            with contextlib.suppress(Exception):
                sb.stdin.close()  # type: ignore[union-attr]
            stop_process(sb, grace=30)

        stack.callback(stop_sandbox)
        if not sb.stdout or not sb.stdout.readline():
            raise SystemExit("the sandbox child did not start")
        print(f"  sandbox loaded ({2 * n} objects) in {time.perf_counter() - t:.1f}s", file=sys.stderr)
        cmd = [sys.executable, "-m", "tests.bench.bench_cache", "--child-cache", "--kubeconfig", str(work / "kubeconfig"),
               "--prometheus", prom_url, "--sizing-api", api_url, "--at", str(end)]
        cmd += [] if args.writes else ["--no-writes"]
        cmd += ["--profile"] if args.profile else []
        cmd += ["--rate-refresh", str(args.rate_refresh)] + (["--no-reuse"] if args.no_reuse else [])
        cmd += ["--status-figures-every", str(args.status_figures_every)]
        p = subprocess.run(cmd, capture_output=True, text=True, cwd=ROOT, timeout=3600)
        if p.returncode != 0:
            print(p.stderr[-3000:], file=sys.stderr)
            return 1
        res = json.loads(p.stdout.strip().splitlines()[-1])
    print(f"\nratefit watch-fed cache benchmark — nproc {os.cpu_count()}, {cpu_model()}, Python {platform.python_version()}")
    print(f"{n} workloads, {2 * n} containers, {n_ns} namespaces; objects cached {res['objects']}")
    print(f"cold start: first sync {res['sync_s']:.2f} s wall ({res['sync_requests']['LIST']} LIST pages, "
          f"{res['sync_requests']['WATCH']} watches opened)")
    print(f"memory: RSS {res['rss_before_mb']} MB before the cache, {res['rss_synced_mb']} MB after its sync "
          f"(cache ≈ {res['rss_synced_mb'] - res['rss_before_mb']:.0f} MB), {res['rss_steady_mb']} MB after the steady "
          f"passes, {res['rss_end_mb']} MB after the passes with moved rates, "
          f"peak {res['peak_rss_mb']} MB (goal ≤ 300 MB)")
    for ps in res["passes"]:
        ph = ps["phases"]
        kr = ps["kube_requests"]
        print(f"\n{ps['pass']}: {ps['outcome']}, {ps['containers']} containers, {ps['status_writes']} status writes "
              f"({ps['deferred_writes']} deferred: only figures moved), "
              f"{ps['events']} events")
        print(f"  wall {ps['wall_s']:.2f} s (steady-state goal ≤ 1.0 s), controller CPU {ps['cpu_s']:.2f} s")
        print(f"  phases: gather {ph.get('gather', 0):.2f} s [cache reads {ph.get('gather_kube', 0):.3f} s, "
              f"PromQL {ph.get('gather_rates', 0):.2f} s (waited {ph.get('gather_rates_wait', 0):.2f} s after the "
              f"reads), sizing {ph.get('gather_sizing', 0):.2f} s], decide {ph.get('decide', 0):.2f} s, act {ph.get('act', 0):.2f} s")
        full = " (the sandbox's log keeps the last 2000 requests: at least this many)" if sum(kr.values()) >= 1990 else ""
        print(f"  API requests in the pass: {kr['LIST']} LIST, {kr['WATCH']} WATCH (re)opened, {kr['GET']} GET, "
              f"{kr['write']} writes{full}; {ps['prom_queries']} PromQL queries in the pass; "
              f"{ps['sizing_calls']} batched sizing calls ({ps['sizing_items']} items asked)")
        print(f"  policies reused unchanged {int(ph.get('reused', 0))}, decided {int(ph.get('decided', 0))}; "
              f"rates from the snapshot {ps['rates_from_snapshot']}; refreshes during the pass {ps['refresh_overlapped']}")
        if ps["errors"]:
            print(f"  errors: {ps['errors']}")
    print(f"\ncache: {res['watch_events']} watch events applied, {res['relists']} relists; the read calls of one pass "
          f"alone (list_policies, list_workloads ×2, list_hpas over everything): {res['cache_reads_ms']} ms")
    if res["refresh"]:
        rf = res["refresh"]
        print(f"rate snapshot: refreshed every {rf['period_s']:g} s by its own thread ({rf['refreshes_during_run']} "
              f"refreshes during the run); one refresh alone: {rf['wall_s']:.2f} s wall, {rf['cpu_s']:.2f} s CPU "
              "(the grouped PromQL query and its decoding)")
    if res["profile"]:
        print("\nprofile of one steady-state pass (cProfile; times inflated by the profiler):")
        print(res["profile"])
    return 0


if __name__ == "__main__":
    sys.exit(main())
