"""`ratefit train` — learn a demand curve per container and store it as an artifact.

Three sources: one CSV (``ratefit train KEY --samples FILE``), a directory with one CSV
per key (``--samples-dir DIR``, files named ``namespace__workload__container.csv``),
or Prometheus range queries (``ratefit train KEY --prometheus URL --rate-query Q --cpu-query Q``).
The work is ``ratefit.models.train``; this module parses flags and prints.
``--from-policies`` (every model the SizingPolicies name) is handled by
``controller/commands/train_from_policies``.
"""

from __future__ import annotations

import argparse
import sys

from ratefit.models.errors import InputError

HELP = "learn a demand curve (rate per pod -> CPU cores) from a CSV or Prometheus and store it"

DESCRIPTION = """\
Learn, for one model NAMESPACE/WORKLOAD/CONTAINER, how much CPU a pod uses
at a given request rate. Samples are cleaned (NaN/stale, duplicate, throttled and
warm-up samples are dropped and counted), every candidate estimator is scored by
k-fold cross-validation (RMSE; ties within 2% go to the simpler estimator), the
chosen estimator is tabulated into a non-decreasing curve with a one-sided
split-conformal upper band, and the model (one artifact per key) is written to
the store atomically.

Cross-validation (--cv): "blocked" holds out contiguous time blocks, so
neighbouring minutes of a time series never sit on both sides of a split; it is
the default when the samples have timestamps. "shuffled" draws samples into
random folds; it is the default without timestamps, and on a time series it
flatters (the errors and the band come out too small). The band is computed from
the held-out errors of the scheme used. With timestamps the chosen estimator and
the baseline are also scored with the other scheme, and the output and the
report show both errors side by side.

CSV columns: rate,cpu (req/s per pod, cores); optional timestamp (unix seconds or
RFC 3339), pod, throttled (share of throttled CFS periods, 0..1).

Examples:
  ratefit train shop/web/app --samples app.csv --store ./models --report ./reports
  ratefit train --samples-dir ./samples --store ./models
  ratefit train shop/web/app --prometheus http://127.0.0.1:9090 --store ./models \\
      --rate-query 'sum by (pod) (rate(http_requests_total{pod=~"web-.*"}[2m]))' \\
      --cpu-query 'sum by (pod) (rate(container_cpu_usage_seconds_total{container="app"}[2m]))' \\
      --lookback 7d --step 30s
  ratefit train --from-policies --prometheus http://127.0.0.1:9090 --store ./models
"""


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "train", help=HELP, description=DESCRIPTION, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    src = p.add_argument_group("samples source (one of)")
    p.add_argument("model", nargs="?", metavar="NAMESPACE/WORKLOAD/CONTAINER",
                   help="the model key (as in the SizingPolicy's model field); with --samples or --prometheus")
    src.add_argument("--samples", metavar="FILE.csv", help="one CSV of samples for the model")
    src.add_argument("--samples-dir", metavar="DIR", help="one CSV per key, named NS__WORKLOAD__CONTAINER.csv")
    src.add_argument("--prometheus", metavar="URL", help="Prometheus base URL, e.g. http://127.0.0.1:9090")
    prom = p.add_argument_group("Prometheus options")
    prom.add_argument("--rate-query", metavar="PROMQL", help="per-pod request rate (req/s), one series per pod")
    prom.add_argument("--cpu-query", metavar="PROMQL", help="per-pod CPU usage (cores), one series per pod")
    prom.add_argument("--throttle-query", metavar="PROMQL",
                      help="per-pod share of throttled CFS periods (0..1); optional")
    prom.add_argument("--lookback", dest="window", default="7d",
                      help="history to learn from: how far back from --end to read (duration, e.g. 2h, 7d; default 7d)")
    prom.add_argument("--window", dest="window", help=argparse.SUPPRESS)  # the spelling before --lookback
    prom.add_argument("--step", default="30s", help="query resolution (Prometheus duration; default 30s)")
    prom.add_argument("--end", metavar="TIME", help="end of the lookback: unix seconds or RFC 3339 (default now)")
    prom.add_argument("--timeout", type=float, default=30.0, help="HTTP timeout per query in seconds (default 30)")
    # the spelling before the positional model key; hidden, kept for old scripts
    p.add_argument("--key", dest="key_option", metavar="NS/WORKLOAD/CONTAINER", help=argparse.SUPPRESS)
    p.add_argument("--store", required=True, metavar="DIR", help="model store directory (created if missing)")
    p.add_argument("--tune", action="store_true",
                   help="hyperparameter grid search, nested inside the cross-validation (slower)")
    p.add_argument("--folds", type=int, default=5, help="cross-validation folds (default 5)")
    p.add_argument("--cv", choices=("blocked", "shuffled"), default=None,
                   help="cross-validation scheme: blocked (contiguous time blocks) or shuffled "
                        "(default: blocked when the samples have timestamps, shuffled otherwise)")
    p.add_argument("--coverage", type=float, default=0.95, help="upper band coverage, 0 < C < 1 (default 0.95)")
    p.add_argument("--seed", type=int, default=0, help="seed for folds and estimators (default 0)")
    p.add_argument("--throttle-threshold", type=float, default=0.05,
                   help="drop samples throttled in more than this share of CFS periods (default 0.05)")
    p.add_argument("--warmup", default="5m",
                   help="drop this span after each pod's first sample (Prometheus duration or 0; default 5m)")
    p.add_argument("--report", metavar="DIR", help="also write a Markdown page and PNG plot per key here")
    p.add_argument("--image", metavar="IMAGE",
                   help="the container image the samples came from, recorded in the model; the controller "
                        "marks the model stale when the container runs another image")
    p.add_argument("--quiet", action="store_true", help="no progress on stderr")
    cap = p.add_argument_group("per-pod capacity (optional; recorded in the model, one of)")
    cap.add_argument("--capacity", type=float, metavar="R",
                     help="the highest rate one pod carries within its latency SLO, req/s")
    cap.add_argument("--profile", metavar="FILE.json",
                     help="read the capacity from the saved output of ratefit profile --output json")
    from ratefit.controller.commands.train_from_policies import add_from_policies_flags, from_policies_or

    add_from_policies_flags(p)  # ratefit train --from-policies
    p.set_defaults(handler=from_policies_or(_run))


def _progress(args: argparse.Namespace):
    if args.quiet:
        return None

    def say(msg: str) -> None:
        print(msg, file=sys.stderr, flush=True)

    return say


def _warmup_seconds(text: str) -> float:
    from ratefit.models.durations import parse_duration

    if text.strip() in ("0", "0s"):
        return 0.0
    return parse_duration(text, field="--warmup")


def _end_time(text: str | None) -> float:
    import time

    from ratefit.models.samples import parse_timestamp

    if text is None:
        return time.time()
    try:
        return parse_timestamp(text)
    except ValueError as exc:
        raise InputError(f"--end: {exc}") from None


def _run(args: argparse.Namespace) -> int:
    from ratefit.models.options import TrainOptions
    from ratefit.models.samples import load_csv
    from ratefit.models.store import ModelStore
    from ratefit.models.train import samples_dir_files, train_key_detailed

    if args.model and args.key_option and args.model != args.key_option:
        raise InputError("give the model key once (positional), not also with --key")
    args.key = args.model or args.key_option
    sources = [s for s in (args.samples, args.samples_dir, args.prometheus) if s]
    if len(sources) != 1:
        raise InputError("give exactly one of --samples FILE.csv, --samples-dir DIR or --prometheus URL")
    if (args.samples or args.prometheus) and not args.key:
        raise InputError("the model key NAMESPACE/WORKLOAD/CONTAINER is required with --samples and --prometheus, "
                         "e.g. ratefit train shop/web/app --samples app.csv --store ./models")
    if args.samples_dir and args.key:
        raise InputError("a model key does not go with --samples-dir: the file names give the keys")
    options = TrainOptions(
        folds=args.folds,
        coverage=args.coverage,
        tune=args.tune,
        seed=args.seed,
        cv=args.cv,
        throttle_threshold=args.throttle_threshold,
        warmup=_warmup_seconds(args.warmup),
    )
    progress = _progress(args)
    store = ModelStore(args.store)
    results = []
    if args.samples:
        results.append(train_key_detailed(load_csv(args.samples), key=args.key, options=options, progress=progress))
    elif args.samples_dir:
        files = samples_dir_files(args.samples_dir)
        for i, (key, path) in enumerate(files.items(), start=1):
            if progress:
                progress(f"[{i}/{len(files)}] {key} from {path}")
            results.append(train_key_detailed(load_csv(path), key=key, options=options, progress=progress))
    else:
        results.append(_from_prometheus(args, options, progress))
    capacity = _capacity(args)
    for res in results:
        if getattr(args, "image", None):
            from dataclasses import replace

            res = replace(res, artifact=with_image(res.artifact, args.image))
        a = res.artifact if capacity is None else res.artifact.with_capacity(capacity)
        path = store.save(a)
        print(f"{a.key}: {res.summary()}, {res.report.summary()} -> {path}")
        if args.report:
            from ratefit.models.report import write_train_report

            md, _ = write_train_report(res, args.report, seed=options.seed)
            print(f"{a.key}: report {md}")
    return 0


def _capacity(args: argparse.Namespace) -> float | None:
    """--capacity R or --profile FILE.json (the knee ratefit profile found), or None."""
    import math

    if args.capacity is not None and args.profile:
        raise InputError("give --capacity R or --profile FILE.json, not both")
    if (args.capacity is not None or args.profile) and args.samples_dir:
        raise InputError("--capacity/--profile describe one key: use them with --samples or --prometheus and --key")
    if args.profile:
        from ratefit.controller.profile.output import read_capacity

        return read_capacity(args.profile)
    if args.capacity is None:
        return None
    if not math.isfinite(args.capacity) or not 0 < args.capacity <= 1e9:
        raise InputError(f"--capacity {args.capacity:g}: must be a positive number of req/s (at most 1e9)")
    return float(args.capacity)


def with_image(artifact, image: str):
    """The artifact recording ``image`` (re-sealed: the image is part of the content)."""
    image = image.strip()
    if not image or len(image) > 512 or any(ch.isspace() for ch in image):
        raise InputError(f"--image {image!r}: give one image reference (no spaces, at most 512 characters)")
    return artifact.model_copy(update={"image": image, "content_hash": ""}).sealed()


def _from_prometheus(args: argparse.Namespace, options, progress):
    from ratefit.models.durations import parse_duration
    from ratefit.models.prometheus import PrometheusClient
    from ratefit.models.train import train_from_prometheus

    if not (args.rate_query and args.cpu_query):
        raise InputError("--rate-query and --cpu-query are required with --prometheus")
    window = parse_duration(args.window, field="--lookback")
    step = parse_duration(args.step, field="--step")
    end = _end_time(args.end)
    with PrometheusClient(args.prometheus, timeout=args.timeout) as client:
        return train_from_prometheus(
            client,
            key=args.key,
            rate_query=args.rate_query,
            cpu_query=args.cpu_query,
            throttle_query=args.throttle_query,
            start=end - window,
            end=end,
            step=step,
            step_text=args.step,
            source=f"prometheus:{args.prometheus}",
            options=options,
            progress=progress,
        )
