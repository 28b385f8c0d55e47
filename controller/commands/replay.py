"""`ratefit replay` — what the SizingPolicies would have done over a stored history.

Thin: parse the flags, read the history, the policies with their workloads and the
models, call ``controller.replay.run_replay``, print, write the report.
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

from ratefit.models.errors import InputError

HELP = """\
Replay a stored history pass by pass and show what the SizingPolicies would have
done: how much CPU they would have reserved against today's requests and against a
careful fixed request, how often pods would have been short of CPU, how many
rollouts and in-place resizes they would have caused and how many nodes the cluster
would have needed. Nothing in a cluster changes: --kubeconfig is only read.

History: --history FILE (OpenMetrics with timestamps) or --prometheus URL with
--from and --to. It must hold the request counter (--rate-metric, labels namespace,
workload, pod) and the cAdvisor counter container_cpu_usage_seconds_total.
Policies and workloads: -f FILE_OR_FOLDER (YAML manifests; repeatable) or
--kubeconfig. Models: --store DIR or --sizing-api URL.

Each pass (every --step) takes the rates from the history up to that moment only,
asks the models, and decides with the live loop's own code, carrying cooldown,
settling and the cluster budget from pass to pass. Every policy runs as if in apply
mode unless --as-written. In-place resizes take effect at once, rollouts after
--rollout-seconds.

Strategies compared: current (today's requests), fixed (per container the 0.95
quantile of its usage over the window), ratefit (what the policies would have set).
cpu_hours = requested cores x hours over pods; under_share = share of pod-minutes
whose usage exceeded the request; peak_nodes = most nodes of --node-cpu needed at
any pass (first-fit decreasing). --report DIR writes plots and a Markdown summary.

A workload under a HorizontalPodAutoscaler on CPU utilisation also gets simulated
replicas (the autoscaler's rule with each strategy's request in force, within its
min and max replicas) and reserved CPU = replicas x request for current, fixed,
ratefit and suggested (the request the review suggests with the autoscaler).
Two policies naming one workload: the newer is held, as the live loop holds it.
"""


def _time(text: str, flag: str) -> float:
    from ratefit.controller.policy import parse_time

    try:
        return float(text)
    except ValueError:
        pass
    try:
        return parse_time(text).timestamp()
    except ValueError:
        raise InputError(f"{flag} {text!r}: give unix seconds or an RFC 3339 time like 2026-01-01T00:00:00Z") from None


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("replay", help="what the policies would have done over a stored history (cost, shortfall, nodes)",
                       description=HELP, formatter_class=argparse.RawDescriptionHelpFormatter)
    h = p.add_argument_group("history")
    h.add_argument("--history", metavar="FILE", help="OpenMetrics file with timestamps")
    h.add_argument("--prometheus", metavar="URL", help="Prometheus base URL (with --from and --to)")
    h.add_argument("--from", dest="start", metavar="TIME", help="start of the window: unix seconds or RFC 3339 "
                   "(default with --history: its first sample)")
    h.add_argument("--to", dest="end", metavar="TIME", help="end of the window (default with --history: its last sample)")
    h.add_argument("--rate-metric", default=os.environ.get("RATEFIT_RATE_METRIC", "http_requests_total"),
                   help="request counter of the rate template (labels namespace, workload, pod); default %(default)s")
    h.add_argument("--rate-range", dest="rate_interval", default="2m", metavar="DURATION",
                   help="the range of rate(), as ratefit plan (default %(default)s)")
    h.add_argument("--rate-interval", dest="rate_interval", help=argparse.SUPPRESS)  # the spelling before --rate-range
    h.add_argument("--rate-step", default="30s", help="subquery step of the percentile over rateWindow (default %(default)s)")
    w = p.add_argument_group("policies and workloads")
    w.add_argument("-f", "--filename", dest="files", action="append", nargs="+", default=[], metavar="PATH",
                   help="YAML file or folder with SizingPolicies, Deployments/StatefulSets and HPAs (repeatable)")
    w.add_argument("--kubeconfig", metavar="FILE", help="read them from this cluster (LIST only, nothing is written)")
    w.add_argument("--context", help="kubeconfig context")
    w.add_argument("--namespace", "-n", action="append", default=[], metavar="NS", help="only these namespaces")
    m = p.add_argument_group("models")
    m.add_argument("--store", metavar="DIR", help="model store folder (read directly)")
    m.add_argument("--sizing-api", metavar="URL", help="sizing API base URL (ratefit serve)")
    m.add_argument("--sizing-token-file", metavar="FILE", help="file holding the sizing API's bearer token")
    s = p.add_argument_group("simulation")
    s.add_argument("--step", default="5m", help="simulated time between passes (default %(default)s)")
    s.add_argument("--node-cpu", type=float, default=8.0, metavar="CORES",
                   help="allocatable CPU of one node, for the node count (default %(default)s)")
    s.add_argument("--as-written", action="store_true", help="keep each policy's mode (dry-run policies change nothing)")
    s.add_argument("--rollout-seconds", type=float, default=120.0,
                   help="seconds from a template patch until the pods run the new request (default %(default)s)")
    s.add_argument("--budget-per-minute", type=float, default=2.0, metavar="N",
                   help="cluster-wide changes per minute, as ratefit run (0: unlimited; default %(default)s)")
    s.add_argument("--max-rollouts", type=int, default=1, metavar="N",
                   help="workloads rolling out at once, as ratefit run (0: unlimited; default %(default)s)")
    s.add_argument("--timeout", type=float, default=30.0, help="seconds per Prometheus / sizing API call (default %(default)s)")
    o = p.add_argument_group("output")
    o.add_argument("--output", "-o", choices=("table", "json", "markdown"), default="table", help="format (default %(default)s)")
    o.add_argument("--report", metavar="DIR", help="write plots (PNG) and summary.md / replay.json into DIR")
    p.set_defaults(handler=_run)


def _check(args: argparse.Namespace) -> None:
    if bool(args.history) == bool(args.prometheus):
        raise InputError("give exactly one of --history FILE or --prometheus URL (with --from and --to)")
    if args.prometheus and not (args.start and args.end):
        raise InputError("--prometheus needs --from and --to")
    if bool(args.files) == bool(args.kubeconfig):
        raise InputError("give the policies and workloads with -f PATH or --kubeconfig FILE (one of them)")
    if bool(args.store) == bool(args.sizing_api):
        raise InputError("give exactly one of --store DIR or --sizing-api URL")
    if not args.node_cpu > 0:
        raise InputError(f"--node-cpu must be more than 0 cores, got {args.node_cpu}")
    if args.rollout_seconds < 0:
        raise InputError("--rollout-seconds must be 0 or more")
    if args.budget_per_minute < 0 or args.max_rollouts < 0:
        raise InputError("--budget-per-minute and --max-rollouts must be 0 (unlimited) or more")


def _run(args: argparse.Namespace) -> int:
    from ratefit.controller.metrics_source import RateRequest
    from ratefit.controller.replay import (
        ApiSizer, BudgetConfig, ReplayOptions, StoreSizer, read_manifests, read_openmetrics, read_prometheus, render,
        run_replay, targets_from_cluster, targets_from_objects,
    )
    from ratefit.controller.replay.engine import pass_times
    from ratefit.controller.replay.history import custom_rates
    from ratefit.models.durations import format_duration, parse_duration

    _check(args)
    step = parse_duration(args.step, field="--step")
    options = ReplayOptions(
        step_s=step, node_cpu=args.node_cpu, as_written=args.as_written, rollout_s=args.rollout_seconds,
        rate_interval_s=parse_duration(args.rate_interval, field="--rate-range"),
        rate_step_s=parse_duration(args.rate_step, field="--rate-step"),
        budget=BudgetConfig(per_minute=args.budget_per_minute, max_rollouts=args.max_rollouts),
    )
    closers = []
    try:
        if args.files:
            targets = targets_from_objects(read_manifests([p for group in args.files for p in group]))
        else:
            from ratefit.controller.kube import KubeAdapter

            kube = KubeAdapter.from_environment(args.kubeconfig, context=args.context)
            closers.append(kube.close)
            targets = targets_from_cluster(kube, args.namespace)
        if args.namespace:
            targets = type(targets)(tuple(t for t in targets.targets if t.policy.namespace in args.namespace),
                                    targets.kinds, targets.notes)
        namespaces = sorted({t.policy.namespace for t in targets.targets})
        longest = max(t.policy.rate_window_s for t in targets.targets) + options.rate_interval_s + options.rate_step_s
        custom = None
        if args.history:
            history = read_openmetrics(args.history, request_metric=args.rate_metric, namespaces=namespaces)
            start = _time(args.start, "--from") if args.start else history.start
            end = _time(args.end, "--to") if args.end else history.end
        else:
            from ratefit.models.prometheus import PrometheusClient

            prom = PrometheusClient(args.prometheus, timeout=args.timeout)
            closers.append(prom.close)
            start, end = _time(args.start, "--from"), _time(args.end, "--to")
            history = read_prometheus(prom, start=start - longest, end=end, request_metric=args.rate_metric,
                                      namespaces=namespaces)
            wanted = [((t.policy.key, c.name), RateRequest(
                namespace=t.policy.namespace, policy=t.policy.name, workload=t.policy.workload_name, container=c.name,
                query=c.rate_query, rate_window=format_duration(t.policy.rate_window_s), percentile=t.policy.rate_percentile))
                for t in targets.targets for c in t.policy.containers if c.rate_query is not None]
            if wanted:
                custom = custom_rates(prom, wanted, pass_times(start, end, step), rate_step=args.rate_step)
        if args.store:
            sizer = StoreSizer(args.store)
        else:
            from ratefit.controller.sizing_client import SizingClient

            token = None
            if args.sizing_token_file:
                try:
                    token = Path(args.sizing_token_file).read_text(encoding="utf-8").strip()
                except OSError as exc:
                    raise InputError(f"--sizing-token-file {args.sizing_token_file}: {exc}") from exc
            client = SizingClient(args.sizing_api, timeout=args.timeout, token=token)
            closers.append(client.close)
            sizer = ApiSizer(client)
        result = run_replay(history, targets, sizer, start=start, end=end, options=options, custom_rates=custom)
    finally:
        for close in closers:
            try:
                close()
            except Exception:  # closing is best effort
                pass
    sys.stdout.write(render(result.outcome, args.output))
    if args.report:
        from ratefit.controller.replay.plots import write_report

        written = write_report(result, Path(args.report))
        print(f"ratefit replay: report in {args.report} ({len(written)} files)", file=sys.stderr)
    return 0
