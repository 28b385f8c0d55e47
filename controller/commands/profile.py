"""`ratefit profile` — measure a service's demand curve and per-pod capacity under load.

Parses flags, builds the load generator and the CPU probe, runs the steps
(``ratefit.controller.profile.steps``), writes the samples CSV and prints the
answer. No measuring or judging happens here.
"""

from __future__ import annotations

import argparse
import json
import sys

from ratefit.models.errors import InputError

HELP = "drive open-loop load at a service in steps and measure CPU, latency and the per-pod capacity"

DESCRIPTION = """\
Profile a service before it has any history: send a constant, open-loop request
rate at URL in rising steps, measure per step the achieved rate, the latency
percentiles (from each request's scheduled send time), the error share and the CPU
the service used, and stop after the first step beyond capacity.

A step is within capacity when p99 <= --slo-p99 (if given), errors <= --max-errors
and the achieved rate >= target x (1 - --rate-tolerance). The capacity (per pod, in
req/s) is the highest step within capacity below the first step beyond it; null
when no step failed (the knee lies above the highest rate tried).

CPU sources (--cpu-from):
  pid:N[,M...]      the processes and all their children, from /proc (give the
                    server's master process: its workers are counted too)
  cgroup:PATH       cgroup v2 cpu.stat (or cgroup v1 cpuacct.usage); a relative
                    PATH is taken under /sys/fs/cgroup
  prometheus:QUERY  a PromQL query that answers cores (needs --prometheus URL),
                    e.g. sum(rate(container_cpu_usage_seconds_total{namespace="staging",
                    pod=~"shop-.*",container!=""}[1m])); keep the rate() range no
                    longer than --warmup

The samples go to --out in the training CSV format (rate,cpu,pod,...): learn a
model from them with  ratefit train --samples FILE.csv --key NS/WORKLOAD/CONTAINER.

Examples:
  ratefit profile --url http://127.0.0.1:8080/api --rates 50,100,200,400 \\
      --step-duration 60s --cpu-from pid:1234 --out shop.csv --output json
  ratefit profile --url http://shop.staging:8080/ --max-rate 400 --steps 8 \\
      --slo-p99 250 --prometheus http://prometheus:9090 \\
      --cpu-from 'prometheus:sum(rate(container_cpu_usage_seconds_total{namespace="staging",pod=~"shop-.*",container!=""}[1m]))' \\
      --warmup 60s --step-duration 3m --out shop.csv --report ./shop-profile
"""


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "profile", help=HELP, description=DESCRIPTION, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    p.add_argument("--url", required=True, help="the URL to load (http:// or https://)")
    rates = p.add_argument_group("rates (one of)")
    rates.add_argument("--rates", metavar="R1,R2,...", help="target rates in req/s, e.g. 5,10,20,40")
    rates.add_argument("--max-rate", type=float, metavar="R", help="highest rate in req/s, with --steps")
    rates.add_argument("--steps", type=int, metavar="N", help="number of evenly spaced steps up to --max-rate (default 5)")
    p.add_argument("--step-duration", default="60s", help="length of one step (duration, default 60s)")
    p.add_argument("--warmup", default=None,
                   help="discarded start of every step (duration or 0; default a sixth of the step)")
    p.add_argument("--sample-interval", default=None,
                   help="length of one CSV sample window (duration; default a tenth of the measured part of a step)")
    p.add_argument("--cpu-from", required=True, metavar="SOURCE",
                   help="pid:N[,M...] | cgroup:PATH | prometheus:QUERY (see above)")
    p.add_argument("--prometheus", metavar="URL", help="Prometheus base URL for --cpu-from prometheus:QUERY")
    p.add_argument("--prometheus-delay", default="0s",
                   help="wait this long after each step before asking Prometheus, so the last scrape is in "
                        "(duration, default 0s)")
    p.add_argument("--slo-p99", type=float, metavar="MS", help="latency objective for p99 in milliseconds")
    p.add_argument("--max-errors", type=float, default=0.01, metavar="SHARE",
                   help="highest error share within capacity, 0..1 (default 0.01)")
    p.add_argument("--rate-tolerance", type=float, default=0.05, metavar="SHARE",
                   help="a step fails when achieved < target x (1 - SHARE) (default 0.05)")
    p.add_argument("--no-stop", action="store_true", help="run every step, also past the first step beyond capacity")
    p.add_argument("--method", default="GET", help="HTTP method (default GET)")
    p.add_argument("--header", action="append", default=[], metavar="'NAME: VALUE'",
                   help="request header, repeatable (default sends 'Accept-Encoding: gzip')")
    p.add_argument("--data-file", metavar="FILE", help="request body read from FILE")
    p.add_argument("--timeout", type=float, default=10.0,
                   help="seconds a request may take from its scheduled time before it counts as an error (default 10)")
    p.add_argument("--max-connections", type=int, default=1024,
                   help="most connections open at once; beyond it requests wait (and their latency shows it)")
    p.add_argument("--out", metavar="FILE.csv", help="write the samples here (training CSV format)")
    p.add_argument("--pod", default="profile", help="value of the CSV's pod column (default profile)")
    p.add_argument("--csv-timestamps", action="store_true",
                   help="add a timestamp column (then train with --warmup 0: the warm-up is already dropped)")
    p.add_argument("--output", choices=("table", "json", "markdown"), default="table",
                   help="how to print the steps and the result (default table)")
    p.add_argument("--report", metavar="DIR", help="also write profile.png (CPU and latency vs rate) and profile.md here")
    p.add_argument("--quiet", action="store_true", help="no progress on stderr")
    p.set_defaults(handler=_run)


def _duration(text: str, flag: str, *, zero_ok: bool = False) -> float:
    from ratefit.models.durations import parse_duration

    if zero_ok and text.strip() in ("0", "0s"):
        return 0.0
    return parse_duration(text, field=flag)


def _rates(text: str) -> list[float]:
    try:
        return [float(x) for x in text.split(",") if x.strip()]
    except ValueError:
        raise InputError(f"--rates {text!r}: write numbers of req/s separated by commas, e.g. 5,10,20") from None


def _headers(items: list[str]) -> dict[str, str]:
    out: dict[str, str] = {}
    for item in items:
        name, sep, value = item.partition(":")
        if not sep or not name.strip():
            raise InputError(f"--header {item!r}: write 'Name: value'")
        out[name.strip()] = value.strip()
    if not any(k.lower() == "accept-encoding" for k in out):
        out["Accept-Encoding"] = "gzip"
    return out


def _run(args: argparse.Namespace) -> int:
    import asyncio
    from pathlib import Path

    from ratefit.controller.profile.cpu_probe import parse_cpu_from
    from ratefit.controller.profile.loadgen import LoadGenerator, parse_target
    from ratefit.controller.profile.output import (
        profile_dict,
        step_markdown,
        step_table,
        write_plot,
        write_samples_csv,
    )
    from ratefit.controller.profile.steps import Criteria, StepPlan, plan_rates, run_profile

    rates = plan_rates(
        rates=_rates(args.rates) if args.rates is not None else None, max_rate=args.max_rate, steps=args.steps
    )
    if args.steps is not None and args.max_rate is None:
        raise InputError("--steps goes with --max-rate")
    step = _duration(args.step_duration, "--step-duration")
    warmup = step / 6 if args.warmup is None else _duration(args.warmup, "--warmup", zero_ok=True)
    interval = None if args.sample_interval is None else _duration(args.sample_interval, "--sample-interval")
    plan = StepPlan(step_duration=step, warmup=warmup, sample_interval=interval)
    criteria = Criteria(slo_p99_ms=args.slo_p99, max_errors=args.max_errors, rate_tolerance=args.rate_tolerance)
    body = b""
    if args.data_file:
        try:
            body = Path(args.data_file).read_bytes()
        except OSError as exc:
            raise InputError(f"--data-file {args.data_file}: {exc.strerror or exc}") from None
    target = parse_target(args.url, method=args.method, headers=_headers(args.header), body=body)
    if args.out:
        out_dir = Path(args.out).resolve().parent
        if not out_dir.is_dir():
            raise InputError(f"--out {args.out}: no such directory {out_dir}")
    probe = parse_cpu_from(args.cpu_from, prometheus_url=args.prometheus, timeout=args.timeout)
    probe.delay = _duration(args.prometheus_delay, "--prometheus-delay", zero_ok=True)
    gen = LoadGenerator(target, timeout=args.timeout, max_connections=args.max_connections)
    say = None if args.quiet else (lambda m: print(m, file=sys.stderr, flush=True))
    if say:
        total = len(rates) * step
        say(f"profiling {target.url}: {len(rates)} steps of {step:g}s (warm-up {warmup:g}s), "
            f"up to {total:g}s, CPU from {probe.description}")
    try:
        result = asyncio.run(run_profile(gen, probe, rates, plan, criteria, progress=say, stop_at_knee=not args.no_stop))
    finally:
        client = getattr(probe, "client", None)
        if client is not None:
            client.close()
    if args.out:
        n = write_samples_csv(result, args.out, pod=args.pod, timestamps=args.csv_timestamps)
        if say:
            say(f"wrote {n} samples to {args.out}")
    if args.report:
        png = write_plot(result, args.report, title=target.url)
        if say:
            say(f"wrote {png} and {png.with_name('profile.md')}")
    if args.output == "json":
        print(json.dumps(profile_dict(result, url=target.url, cpu_from=probe.description, samples_file=args.out), indent=2))
    elif args.output == "markdown":
        print(step_markdown(result))
    else:
        print(step_table(result))
    return 0
