"""The ``--from-policies`` part of ``ratefit train``: its flags and its handler.

Thin: parse and check the flags, read the policies (cluster or files), build the sample
source, call ``controller/train_policies.train_from_policies``, print the summary.
``controller/commands/train.py`` adds these flags to its parser and routes here when
``--from-policies`` is given.
"""

from __future__ import annotations

import argparse
import os
from collections.abc import Callable

from ratefit.models.errors import InputError

EPILOG = """\
From the policies (--from-policies):
  Reads every SizingPolicy (from the cluster: --kubeconfig/--context, all namespaces
  or --namespace NS; or from manifest files and folders: -f PATH), derives each
  container's rate, CPU and throttling queries (the rate from --rate-preset, or the
  policy's own rateQuery, which must stay inside the policy's namespace; CPU and
  throttling from the kubelet's cAdvisor series), and trains every model that is
  missing in --store or older than --max-age, in --jobs worker processes. Exactly the
  models the policies name are trained, no other. A progress line per model goes to
  stderr; one summary goes to stdout: model, estimator chosen, samples used/total and
  dropped, CV RMSE against the fixed-allocation baseline, trained rate range, then each
  failure and each unreadable policy with its reason. One failing model never stops
  the others.

  --shard I/N trains only the models whose key's CRC-32 modulo N is I, so N runs (the
  indexes of an Indexed Job) split the keys disjointly and completely; --shard auto/N
  takes I from JOB_COMPLETION_INDEX, which Kubernetes sets in each pod of an Indexed Job.

  Exit status: 0 when every model named is trained or up to date; 1 when some model
  failed or some policy could not be read (the others were trained); 2 on bad input.

  ratefit train --from-policies --prometheus http://127.0.0.1:9090 --store ./models
  ratefit train --from-policies -f manifests/examples --prometheus URL --store ./models --jobs 2
  ratefit train --from-policies --shard auto/4 --prometheus URL --store /var/lib/ratefit/models
"""


def add_from_policies_flags(p: argparse.ArgumentParser) -> None:
    """The flags of ``ratefit train --from-policies`` (the parser already has --prometheus,
    --window/--lookback, --step, --end, --timeout, --store, --samples-dir, --report …)."""
    from ratefit.controller.rate_presets import DEFAULT_PRESET

    g = p.add_argument_group("from the policies (--from-policies)")
    g.add_argument("--from-policies", action="store_true",
                   help="train every model the SizingPolicies name that is missing or older than --max-age")
    g.add_argument("-f", "--filename", action="append", default=[], metavar="PATH",
                   help="read the policies from this manifest file or folder (repeat; default: from the cluster)")
    g.add_argument("--kubeconfig", metavar="FILE",
                   help="kubeconfig of the cluster (default: $KUBECONFIG, else in-cluster service account, "
                        "else ~/.kube/config)")
    g.add_argument("--context", help="kubeconfig context to use")
    g.add_argument("--namespace", "-n", action="append", default=[], metavar="NS",
                   help="only SizingPolicies in this namespace (repeat; default: all namespaces)")
    g.add_argument("--max-age", default="7d",
                   help="retrain a model trained longer ago than this (Prometheus duration, or 0 to retrain all; "
                        "default %(default)s)")
    g.add_argument("--jobs", "-j", type=int, default=None, metavar="N",
                   help="worker processes (default min(4, CPUs))")
    g.add_argument("--shard", metavar="I/N",
                   help="train only shard I of N (CRC-32 of the model key mod N); auto/N reads I from "
                        "JOB_COMPLETION_INDEX")
    g.add_argument("--output", "-o", choices=("table", "json", "markdown"), default="table",
                   help="summary format (default %(default)s)")
    g.add_argument("--estimators", metavar="NAMES",
                   help="comma-separated candidate estimators to try (default: all; the fixed baseline is "
                        "always scored)")
    g.add_argument("--rate-preset", default=os.environ.get("RATEFIT_RATE_PRESET") or DEFAULT_PRESET, metavar="NAME",
                   help="request-counter convention of the derived rate query, as for ratefit plan "
                        "(default $RATEFIT_RATE_PRESET, else %(default)s)")
    g.add_argument("--rate-metric", default=os.environ.get("RATEFIT_RATE_METRIC") or None,
                   help="replace the preset's request counter (default $RATEFIT_RATE_METRIC, else the preset's)")
    g.add_argument("--rate-interval", default="2m",
                   help="rate() interval of the derived queries (default %(default)s)")
    g.add_argument("--allow-raw-rate-queries", action="store_true",
                   help="let policies' rateQuery read any namespace's series (admin's choice)")
    p.epilog = (p.epilog + "\n" if p.epilog else "") + EPILOG


def from_policies_or(handler: Callable[[argparse.Namespace], int]) -> Callable[[argparse.Namespace], int]:
    """``handler`` for the other sources; :func:`run` when ``--from-policies`` is given."""

    def dispatch(args: argparse.Namespace) -> int:
        if getattr(args, "from_policies", False):
            return run(args)
        only = [flag for flag, dest in (("-f", "filename"), ("--kubeconfig", "kubeconfig"), ("--shard", "shard"),
                                        ("--namespace", "namespace"), ("--jobs", "jobs"),
                                        ("--estimators", "estimators"), ("--context", "context"))
                if getattr(args, dest, None)]
        if only:
            raise InputError(f"{', '.join(only)} only go with --from-policies")
        return handler(args)

    return dispatch


def _seconds(text: str, flag: str) -> float:
    from ratefit.models.durations import parse_duration

    if text.strip() in ("0", "0s"):
        return 0.0
    return parse_duration(text, field=flag)


def _train_options(args: argparse.Namespace) -> dict:
    """The models.train keyword options (``TrainOptions`` fields) from the shared flags."""
    from ratefit.models.options import TrainOptions

    opts = dict(folds=args.folds, coverage=args.coverage, tune=args.tune, seed=args.seed, cv=args.cv,
                throttle_threshold=args.throttle_threshold, warmup=_seconds(args.warmup, "--warmup"))
    TrainOptions(**opts)  # every value checked once, before any work (one-line InputError)
    return opts


def build_source(args: argparse.Namespace):
    """PromSource (--prometheus) or CsvSource (--samples-dir)."""
    import time

    from ratefit.controller.train_policies import CsvSource, PromSource
    from ratefit.models.durations import parse_duration
    from ratefit.models.samples import parse_timestamp

    if bool(args.prometheus) == bool(args.samples_dir):
        raise InputError("--from-policies needs exactly one of --prometheus URL or --samples-dir DIR")
    if args.samples:
        raise InputError("--samples FILE does not go with --from-policies (the policies name the keys)")
    if args.key:
        raise InputError("--key does not go with --from-policies (the policies name the keys)")
    if args.samples_dir:
        if not os.path.isdir(args.samples_dir):
            raise InputError(f"--samples-dir {args.samples_dir}: not a directory")
        return CsvSource(directory=os.path.abspath(args.samples_dir))
    lookback = parse_duration(args.window, field="--lookback")
    step = parse_duration(args.step, field="--step")
    if args.end is None:
        end = time.time()
    else:
        try:
            end = parse_timestamp(args.end)
        except ValueError as exc:
            raise InputError(f"--end: {exc}") from None
    return PromSource(url=args.prometheus, start=end - lookback, end=end, step=step, step_text=args.step,
                      timeout=args.timeout)


def read_sources(args: argparse.Namespace):
    """The policies from -f files, or from the cluster."""
    from ratefit.controller.train_policies import policies_from_cluster, read_policy_files

    if args.filename:
        if args.kubeconfig or args.context:
            raise InputError("give -f PATH or --kubeconfig/--context, not both")
        sources = read_policy_files(args.filename)
        if args.namespace:
            keep = set(args.namespace)
            sources = [s for s in sources if ((s.obj.get("metadata") or {}).get("namespace") or "default") in keep]
        return sources
    from ratefit.controller.kube import KubeAdapter

    kube = KubeAdapter.from_environment(args.kubeconfig, context=args.context, identity="ratefit-train")
    try:
        return policies_from_cluster(kube, args.namespace)
    finally:
        kube.close()


def run(args: argparse.Namespace) -> int:
    import sys

    from ratefit.controller.promql_guard import QueryGuard
    from ratefit.controller.rate_presets import template_for
    from ratefit.controller.train_policies import default_jobs, parse_shard, render_summary, train_from_policies
    from ratefit.models.candidates import get_candidates

    jobs = default_jobs() if args.jobs is None else args.jobs
    if jobs < 1:
        raise InputError(f"--jobs {jobs}: give at least 1")
    shard = parse_shard(args.shard)
    max_age = _seconds(args.max_age, "--max-age")
    options = _train_options(args)
    estimators = None
    if args.estimators:
        estimators = [n.strip() for n in args.estimators.split(",") if n.strip()]
        names = {c.name for c in get_candidates(estimators)}  # unknown names: one-line InputError
        if "fixed" not in names:
            estimators.insert(0, "fixed")  # the baseline every summary compares against
    template = template_for(args.rate_preset, metric=args.rate_metric, interval=args.rate_interval)
    guard = QueryGuard(enforce_namespace=not args.allow_raw_rate_queries)
    source = build_source(args)
    sources = read_sources(args)
    progress = None if args.quiet else (lambda line: print(line, file=sys.stderr, flush=True))
    summary = train_from_policies(sources, source=source, store_dir=args.store, max_age_s=max_age, jobs=jobs,
                                  shard=shard, template=template, interval=args.rate_interval, guard=guard,
                                  options=options, estimators=estimators, report_dir=args.report, progress=progress)
    sys.stdout.write(render_summary(summary, args.output))
    return summary.exit_code()
