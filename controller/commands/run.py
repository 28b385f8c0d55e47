"""`ratefit run` — the reconcile loop: a pass every --interval, as Lease holder only.

Also holds the connection flags and wiring that `ratefit plan` shares
(:func:`add_connection_flags`, :func:`connect`). Thin: parse, build the adapters,
hand them to ``controller/reconcile`` and ``controller/loop``.
"""

from __future__ import annotations

import argparse
import logging
import os
import sys
from dataclasses import dataclass
from typing import Any

from ratefit.controller.exit_status import EXIT_CODES_HELP
from ratefit.models.errors import InputError

HELP = """\
Run the reconcile loop against a cluster: every --interval (and at once when a
SizingPolicy changes) read every container's per-pod request rate from Prometheus
(one grouped query), ask the sizing API what that rate costs (one batch call),
decide within each policy's bounds, and act: status, Event, log line and metric;
in apply mode (a policy's mode Apply, and no --dry-run) a server-side dry run,
then one strategic-merge patch per workload (or in-place pod resizes), within the
cluster-wide budget of --budget-per-minute changes and --max-rollouts rollouts.

Reads come from a watch-fed cache: SizingPolicies, Deployments, StatefulSets and
HPAs (and the pods of in-place policies) are listed once, then watched (per
namespace when --namespace is given); a pass sends no LIST. /readyz answers 503
until the cache has synced. --once reads with plain LISTs instead, like plan.

Only the holder of the Lease --lease-namespace/--lease-name acts; other replicas
stand by and keep answering /healthz and /readyz on --metrics-port.
SIGTERM/SIGINT: finish the workload being patched, abandon the rest of the pass,
release the Lease, exit 0.

Start with --dry-run (or ratefit plan) and review every proposal first.
The environment variable RATEFIT_DRY_RUN=true|false sets the default of --dry-run.

--once runs one pass and exits: from a laptop add --no-leader-election. With a
Lease, --once checks the Lease namespace as soon as the Lease cannot be had and
stops with one line when it does not exist; it gives up with exit 7 when another
replica keeps the Lease.
The exit status of --once is that of ratefit plan:

""" + EXIT_CODES_HELP + """Without --once the loop runs until SIGTERM/SIGINT and exits 0.
"""


class JsonLines(logging.Formatter):
    """One JSON object per log line: time, level, logger, and the message — a message
    that is itself a JSON object (the pass summary, each decision) is merged in."""

    def format(self, record: logging.LogRecord) -> str:
        import json
        from datetime import datetime, timezone

        out: dict[str, Any] = {
            "time": datetime.fromtimestamp(record.created, tz=timezone.utc).isoformat(timespec="milliseconds"),
            "level": record.levelname.lower(),
            "logger": record.name,
        }
        msg = record.getMessage()
        try:
            doc = json.loads(msg) if msg.startswith("{") else None
        except ValueError:
            doc = None
        if isinstance(doc, dict):
            out.update(doc)
        else:
            out["msg"] = msg
        if record.exc_info:
            out["error"] = self.formatException(record.exc_info)
        return json.dumps(out, sort_keys=False, default=str)


def _default_metrics_host() -> str:
    if os.environ.get("RATEFIT_METRICS_HOST"):
        return os.environ["RATEFIT_METRICS_HOST"]
    # in a pod (the service-account environment is set): probes come from the node
    return "0.0.0.0" if os.environ.get("KUBERNETES_SERVICE_HOST") else "127.0.0.1"


def _truthy(text: str | None) -> bool:
    return (text or "").strip().lower() in ("1", "true", "yes", "on")


def add_connection_flags(p: argparse.ArgumentParser, *, sizing_required: bool = True) -> None:
    """The flags `run`, `plan` and `check` share: where the cluster, the rates and the sizing API are."""
    g = p.add_argument_group("connections")
    g.add_argument("--kubeconfig", metavar="FILE",
                   help="kubeconfig of the cluster (default: $KUBECONFIG, else in-cluster service account, else ~/.kube/config)")
    g.add_argument("--context", help="kubeconfig context to use")
    g.add_argument("--prometheus", metavar="URL", help="Prometheus base URL, e.g. http://127.0.0.1:9090")
    g.add_argument("--replay", metavar="FILE",
                   help="instead of --prometheus: compute the rates offline from an OpenMetrics history file")
    g.add_argument("--sizing-api", metavar="URL", required=sizing_required, help="sizing API base URL (ratefit serve), e.g. http://127.0.0.1:8470")
    g.add_argument("--sizing-token-file", metavar="FILE", help="file holding the sizing API's bearer token")
    g.add_argument("--namespace", "-n", action="append", default=[], metavar="NS",
                   help="only SizingPolicies in this namespace (repeat for several; default: all namespaces)")
    r = p.add_argument_group("rates")
    r.add_argument("--rate-preset", default=os.environ.get("RATEFIT_RATE_PRESET") or "http-requests-total",
                   metavar="NAME",
                   help="request-counter convention of the default rate query (see the table below; "
                        "default $RATEFIT_RATE_PRESET, else http-requests-total; now %(default)s)")
    r.add_argument("--rate-metric", default=os.environ.get("RATEFIT_RATE_METRIC") or None,
                   help="replace the preset's request counter (labels namespace and pod), e.g. orders_http_requests_total "
                        "(default $RATEFIT_RATE_METRIC, else the preset's)")
    r.add_argument("--allow-raw-rate-queries", action="store_true",
                   help="let policies' rateQuery read any namespace's series (admin's choice; by default every "
                        'selector of a rateQuery must carry namespace="<the policy\'s namespace>")')
    r.add_argument("--max-rate-series", type=int, default=500, metavar="N",
                   help="hold a container (TooManySeries) whose rate query answers more than N series "
                        "(0: no cap; default %(default)s)")
    r.add_argument("--rate-range", default="2m", metavar="DURATION",
                   help="the range of rate() in the default query, e.g. 1m, 2m (default %(default)s)")
    r.add_argument("--rate-interval", dest="rate_range", help=argparse.SUPPRESS)  # the spelling before --rate-range
    r.add_argument("--rate-step", default="30s", metavar="DURATION",
                   help="subquery step for the percentile over the policy's rateWindow (default %(default)s)")
    r.add_argument("--rate-at", type=float, metavar="UNIX_SECONDS",
                   help="evaluate the rates at this time instead of now (replays, reproducible reviews)")
    r.add_argument("--timeout", type=float, default=10.0, help="seconds for each Prometheus and sizing API call (default %(default)s)")
    st = p.add_argument_group("stale models")
    st.add_argument("--stale-window", metavar="DURATION", default=os.environ.get("RATEFIT_STALE_WINDOW") or None,
                    help="each pass, compare containers' CPU usage over this window with their model's upper band "
                         "and mark a model stale when the excess is significant (one-sided binomial test, level "
                         "0.001); 'off' turns the check off (default $RATEFIT_STALE_WINDOW, else 6h with --prometheus; "
                         "off with --replay, which has no CPU usage series)")
    st.add_argument("--stale-step", default="5m",
                    help="sample step (and rate interval) of that comparison (default %(default)s)")
    st.add_argument("--stale-every", default="10m", metavar="DURATION",
                    help="judge a container again when its last judgement is older than this; between judgements "
                         "it carries its last verdict (default %(default)s)")
    st.add_argument("--stale-per-pass", type=int, default=500, metavar="N",
                    help="judge at most N containers per pass (two range queries each): never judged first, then "
                         "the longest ago (default %(default)s)")
    if p.epilog is None:
        from ratefit.controller.rate_presets import preset_table

        p.epilog = ("rate presets (--rate-preset) and the PromQL each produces for the Deployment api in "
                    "namespace shop:\n" + preset_table())


@dataclass
class Connections:
    kube: Any
    rates: Any
    sizing: Any
    rate_source: str  # what the rates come from, for the output
    #: recent (rate, CPU) samples for the staleness check (None: off)
    usage: Any = None

    def close(self) -> None:
        for obj in (self.sizing, getattr(self.rates, "client", None), getattr(self.usage, "client", None),
                    getattr(getattr(self.usage, "background", None), "sizing", None), self.kube):
            close = getattr(obj, "close", None)
            if close is not None:
                try:
                    close()
                except Exception:  # closing is best effort
                    pass


def connect(args: argparse.Namespace, *, identity: str | None = None) -> Connections:
    """Build the Kubernetes adapter, the rate source and the sizing client from the flags."""
    from ratefit.controller.metrics_source import PrometheusRateSource, ReplayRateSource
    from ratefit.controller.promql_guard import QueryGuard
    from ratefit.controller.rate_presets import template_for
    from ratefit.controller.sizing_client import SizingClient
    from ratefit.models.prometheus import PrometheusClient

    if bool(args.prometheus) == bool(args.replay):
        raise InputError("give exactly one of --prometheus URL or --replay FILE")
    template = template_for(args.rate_preset, metric=args.rate_metric, interval=args.rate_range)
    if args.max_rate_series < 0:
        raise InputError("--max-rate-series must be 0 (no cap) or positive")
    guard = QueryGuard(enforce_namespace=not args.allow_raw_rate_queries, max_series=args.max_rate_series)
    if args.prometheus:
        rates = PrometheusRateSource(PrometheusClient(args.prometheus, timeout=args.timeout), at=args.rate_at,
                                     template=template, step=args.rate_step, guard=guard)
        source = f"Prometheus at {args.prometheus}"
    else:
        if not os.path.exists(args.replay):
            raise InputError(f"--replay {args.replay}: no such file")
        rates = ReplayRateSource(args.replay, at=args.rate_at, template=template, step=args.rate_step)
        source = f"replay of {args.replay}"
    token = sizing_token(args)
    kwargs = {"identity": identity} if identity else {}
    kube = kube_from_args(args, **kwargs)
    sizing = SizingClient(args.sizing_api, timeout=args.timeout, token=token)
    usage = None
    window = stale_window(args)
    if window is not None:
        from ratefit.controller.stale_memo import JudgementMemo
        from ratefit.controller.usage_source import ModelFacts, PrometheusUsageSource
        from ratefit.models.durations import parse_duration

        try:
            memo = JudgementMemo(every_s=parse_duration(args.stale_every, field="--stale-every"),
                                 per_pass=args.stale_per_pass)
            # a client of its own: `ratefit run` judges on a thread beside the pass's queries
            usage = PrometheusUsageSource(PrometheusClient(args.prometheus, timeout=args.timeout),
                                          template=template, window=window,
                                          step=args.stale_step, at=args.rate_at, guard=guard,
                                          facts=ModelFacts(sizing), memo=memo,
                                          max_containers=max(200, args.stale_per_pass))
        except ValueError as exc:
            raise InputError(f"--stale-window/--stale-step/--stale-every/--stale-per-pass: {exc}") from exc
    return Connections(kube=kube, rates=rates, sizing=sizing, rate_source=source, usage=usage)


def stale_window(args: argparse.Namespace) -> str | None:
    """The staleness check's window, or None when the check is off: on by default (6 h)
    with --prometheus, off with --replay (no CPU usage series) unless asked for, which is
    then an error; 'off', 'none' or '0' turn it off."""
    from ratefit.controller.usage_source import DEFAULT_WINDOW

    given = getattr(args, "stale_window", None)
    if given is not None and given.strip().lower() in ("off", "none", "0", "false", "no"):
        return None
    if not args.prometheus:
        if given is not None and not os.environ.get("RATEFIT_STALE_WINDOW"):
            raise InputError("--stale-window needs --prometheus (a replay has no CPU usage series); "
                             "leave it out or give --stale-window off")
        return None
    return given if given is not None else DEFAULT_WINDOW


def duration_or_off(text: str | None, *, field: str) -> float:
    """Seconds of a duration flag that may also be off: None, '0', '0s', 'off' or 'never'
    give 0.0; anything else must be a Prometheus duration (InputError naming ``field``)."""
    from ratefit.models.durations import parse_duration

    if text is None or text.strip().lower() in ("0", "0s", "off", "never", "none"):
        return 0.0
    return parse_duration(text, field=field)


def sizing_token(args: argparse.Namespace) -> str | None:
    """The sizing API's bearer token from --sizing-token-file (None: no file given)."""
    if not args.sizing_token_file:
        return None
    try:
        with open(args.sizing_token_file, encoding="utf-8") as fh:
            return fh.read().strip()
    except OSError as exc:
        raise InputError(f"--sizing-token-file {args.sizing_token_file}: {exc}") from exc


def kube_from_args(args: argparse.Namespace, **kwargs: Any) -> Any:
    """The Kubernetes adapter from --kubeconfig/--context; a kubeconfig that cannot be
    read or parsed is one line naming the file (never a YAML traceback)."""
    import yaml

    from ratefit.controller.kube import KubeAdapter

    if args.kubeconfig and not os.path.exists(args.kubeconfig):
        raise InputError(f"--kubeconfig {args.kubeconfig}: no such file")
    try:
        return KubeAdapter.from_environment(args.kubeconfig, context=args.context, **kwargs)
    except (yaml.YAMLError, ValueError, KeyError, AttributeError, TypeError) as exc:
        if isinstance(exc, InputError):
            raise
        where = args.kubeconfig or os.environ.get("KUBECONFIG") or "~/.kube/config"
        first = " ".join(str(exc).split())[:200]
        raise InputError(f"kubeconfig {where} is not a valid kubeconfig ({type(exc).__name__}: {first}); "
                         "fix the file or pass --kubeconfig FILE") from exc


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("run", help="run the reconcile loop (dry-run or apply, per policy)", description=HELP,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    add_connection_flags(p)
    p.add_argument("--dry-run", action=argparse.BooleanOptionalAction, default=_truthy(os.environ.get("RATEFIT_DRY_RUN")),
                   help="force every policy to dry-run: decide, write status and Events, never patch "
                        "(default from RATEFIT_DRY_RUN, else off)")
    p.add_argument("--interval", default="60s", metavar="DURATION", help="time between passes, e.g. 60s, 5m (default %(default)s)")
    p.add_argument("--budget-per-minute", type=float, default=2.0, metavar="N",
                   help="cluster-wide changes per minute (0: unlimited; default %(default)s)")
    p.add_argument("--max-rollouts", type=int, default=1, metavar="N",
                   help="workloads rolling out at once, cluster-wide (0: unlimited; default %(default)s)")
    p.add_argument("--metrics-port", type=int, default=8471, help="port of /metrics, /healthz, /readyz (-1: off; default %(default)s)")
    p.add_argument("--metrics-host", default=_default_metrics_host(),
                   help="address to bind it to (default: $RATEFIT_METRICS_HOST, else 0.0.0.0 inside a pod — so the "
                        "kubelet's probes reach it — else 127.0.0.1; now %(default)s)")
    p.add_argument("--identity", default=os.environ.get("POD_NAME"), help="this replica's name in the Lease and Events (default $POD_NAME or host name)")
    p.add_argument("--lease-namespace", default="ratefit-system", help="namespace of the leader Lease (default %(default)s)")
    p.add_argument("--lease-name", default="ratefit-controller", help="name of the leader Lease (default %(default)s)")
    p.add_argument("--lease-duration", default="15s", metavar="DURATION",
                   help="how long a leader's Lease holds without renewal (default %(default)s, client-go's); the "
                        "leader renews every 2/15 of it and steps down when 2/3 of it passed without a renewal")
    p.add_argument("--no-leader-election", action="store_true", help="act without a Lease (only ever run ONE replica like this)")
    p.add_argument("--shard", metavar="I/N",
                   help="act only on policies whose namespace hashes (CRC-32 mod N) to shard I of N; the Lease "
                        "becomes <lease-name>-I-of-N, so each shard elects its own leader")
    p.add_argument("--once", action="store_true", help="run one pass and exit (as leader, when the Lease can be had)")
    p.add_argument("--cache-resync", default="10m", metavar="DURATION",
                   help="full relist of the watch-fed cache every DURATION, e.g. 10m (0s or off: never; "
                        "default %(default)s)")
    p.add_argument("--rate-refresh", metavar="DURATION", default=os.environ.get("RATEFIT_RATE_REFRESH") or "30s",
                   help="read the rates from a snapshot that its own thread refreshes every DURATION, so a pass "
                        "does not wait for Prometheus; new or changed queries and rates older than three periods "
                        "are asked in the pass; 0s or off: every pass asks Prometheus itself (default "
                        "$RATEFIT_RATE_REFRESH, else 30s; --once never uses it)")
    p.add_argument("--status-figures-every", metavar="DURATION",
                   default=os.environ.get("RATEFIT_STATUS_FIGURES_EVERY") or "5m",
                   help="rewrite a policy's status at most every DURATION (stretched by up to half per policy) "
                        "when only its figures moved — rate, demand, band, target; decisions, reasons, requests, "
                        "conditions and settling are written at once; 0s or off: every change at once "
                        "(default $RATEFIT_STATUS_FIGURES_EVERY, else 5m)")
    p.add_argument("--log-level", default="INFO", help="log level (default %(default)s)")
    p.add_argument("--retrain-store", metavar="DIR",
                   help="retrain stale models of policies with retrain: Auto into this model store (the one the "
                        "sizing API serves), in the background; needs the staleness check (on by default with --prometheus)")
    p.add_argument("--retrain-stale", action="store_true",
                   help="with --retrain-store: retrain every stale model, whatever the policy's retrain says")
    p.add_argument("--retrain-step", default="1m", help="sample step of automatic retraining (default %(default)s)")
    p.set_defaults(handler=_run)


def _run(args: argparse.Namespace) -> int:
    import random
    import signal
    import threading
    import time

    from ratefit.controller.limits import Budget, ExponentialBackoff, RolloutSlots, TokenBucket
    from ratefit.controller.loop import ControllerLoop
    from ratefit.controller.reconcile import ReconcileConfig, Reconciler, crash_hook_from_env
    from ratefit.controller.telemetry import HealthServer, Telemetry
    from ratefit.models.durations import parse_duration

    handler = logging.StreamHandler(sys.stderr)
    handler.setFormatter(JsonLines())
    logging.basicConfig(level=getattr(logging, str(args.log_level).upper(), logging.INFO), handlers=[handler])
    # the client library's retry chatter is not ours to print: the adapter reports what failed
    logging.getLogger("urllib3").setLevel(logging.ERROR)
    interval = parse_duration(args.interval, field="--interval")
    if interval <= 0:
        raise InputError("--interval must be longer than 0s")
    check_limits(args)
    shard = parse_shard(args.shard)
    resync = duration_or_off(args.cache_resync, field="--cache-resync")
    rate_refresh = duration_or_off(args.rate_refresh, field="--rate-refresh")
    figures_every = duration_or_off(args.status_figures_every, field="--status-figures-every")
    lease_s = parse_duration(args.lease_duration, field="--lease-duration")
    if not 2.0 <= lease_s <= 3600.0:
        raise InputError(f"--lease-duration must be between 2s and 1h, got {args.lease_duration}")
    conns = connect(args, identity=args.identity)
    lease_name = args.lease_name if shard is None else f"{args.lease_name}-{shard[0]}-of-{shard[1]}"
    cache = None
    kube: Any = conns.kube
    if not args.once:  # one pass needs no cache: it LISTs, like `ratefit plan`
        from ratefit.controller.kube_cache import CachedKube, KubeCache

        cache = KubeCache.for_adapter(conns.kube, namespaces=args.namespace, resync_s=resync)
        kube = CachedKube(reader=cache, writer=conns.kube)
    telemetry = Telemetry()
    rates: Any = conns.rates
    snapshot = None
    if rate_refresh > 0 and not args.once:  # controller/rates_snapshot.py
        from ratefit.controller.rates_snapshot import RateSnapshot

        snapshot = rates = RateSnapshot(conns.rates, period_s=rate_refresh, registry=telemetry.registry)
    mono = time.monotonic
    budget = Budget(
        bucket=TokenBucket.per_minute(args.budget_per_minute, now=mono()) if args.budget_per_minute > 0 else None,
        slots=RolloutSlots(args.max_rollouts) if args.max_rollouts > 0 else None,
    )
    retrainer = None
    if args.retrain_store:
        if conns.usage is None:
            raise InputError("--retrain-store needs the staleness check (on by default with --prometheus; "
                             "not with --replay or --stale-window off): only a stale model is retrained")
        from ratefit.controller.retrain import Retrainer
        from ratefit.models.store import ModelStore

        retrainer = Retrainer(client=conns.rates.client, store=ModelStore(args.retrain_store),
                              template=conns.usage.rate_template,
                              step=args.retrain_step, reload=conns.sizing.reload, source=f"prometheus:{args.prometheus}")
    elif args.retrain_stale:
        raise InputError("--retrain-stale goes with --retrain-store DIR")
    reconciler = Reconciler(
        usage=conns.usage, retrainer=retrainer, retrain_all=args.retrain_stale,
        kube=kube, rates=rates, sizing=conns.sizing,
        config=ReconcileConfig(dry_run=args.dry_run, write=True, namespaces=tuple(args.namespace),
                               identity=conns.kube.identity, shard=shard,
                               status_figures_every_s=figures_every),
        budget=budget, backoff=ExponentialBackoff(base=5.0, cap=300.0, rng=random.Random()),
        telemetry=telemetry, crash_hook=crash_hook_from_env(os.environ.get("RATEFIT_CRASH_AT")),
    )
    elector = None if args.no_leader_election else conns.kube.leader_elector(
        namespace=args.lease_namespace, name=lease_name, lease_duration=lease_s,
        renew_deadline=lease_s * 2.0 / 3.0, retry_period=lease_s * 2.0 / 15.0)
    gave_up: list[tuple[int, str]] = []
    if args.once and elector is not None:
        # the first Lease attempt that fails checks the Lease namespace: a missing one would
        # make --once wait forever (only then: a controller that gets its Lease reads no namespace)
        def first_miss() -> None:
            problem = lease_namespace_problem(conns.kube, args.lease_namespace)
            if problem is not None:
                gave_up.append(problem)
                loop.stop()

        elector = OnceElector(elector, first_miss)
    last: list[Any] = []
    started = threading.Event()
    stop_watch = threading.Event()  # set when the command ends

    def run_pass(control: Any) -> Any:
        started.set()
        result = reconciler.run_pass(control)
        last[:] = [result]
        return result

    loop = ControllerLoop(
        run_pass=run_pass if cache is None else _after_sync(cache, run_pass),
        elector=elector, interval_s=interval,
        retry_period_s=getattr(elector, "retry_period", 2.0), renew_deadline_s=getattr(elector, "renew_deadline", 10.0),
        telemetry=telemetry, max_passes=1 if args.once else None,
    )
    if cache is not None:
        cache.on_policy_change = loop.wake  # a policy's spec changed: run a pass now
        telemetry.watch_cache(cache.stats)
        # while leading, not ready before the cache has synced (a standby is ready as before)
        telemetry.set_readiness_gate(lambda: cache.has_synced() or not loop.is_leader,
                                     "the watch-fed cache has not synced yet")
    health = None
    if args.metrics_port >= 0:
        try:
            health = HealthServer(telemetry, host=args.metrics_host, port=args.metrics_port).start()
        except OSError as exc:
            conns.close()
            raise InputError(f"--metrics-port {args.metrics_port} on {args.metrics_host}: {exc.strerror or exc}; "
                             "pick another port (0: any free one, -1: off)") from exc
        print(f"ratefit run: /metrics /healthz /readyz on {health.url}", file=sys.stderr, flush=True)

    def on_signal(signum: int, frame: Any) -> None:
        print(f"ratefit run: {signal.Signals(signum).name}: stopping after the current workload", file=sys.stderr, flush=True)
        loop.stop()

    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    if cache is not None:
        cache.start()
    if snapshot is not None:
        snapshot.start()
    judge = None
    if conns.usage is not None and not args.once:  # judge staleness beside the passes (controller/stale_memo.py)
        from ratefit.controller.sizing_client import SizingClient
        from ratefit.controller.stale_memo import BackgroundJudge

        judge = conns.usage.background = BackgroundJudge(
            sizing=SizingClient(args.sizing_api, timeout=args.timeout, token=sizing_token(args)))
    if args.once and elector is not None:
        # --once as a standby would wait forever: give up after two Lease durations
        patience = 2 * float(getattr(elector, "lease_duration", 15.0)) + float(getattr(elector, "retry_period", 2.0))

        def give_up() -> None:
            if not started.wait(patience) and not stop_watch.is_set():
                holder = getattr(elector, "holder", None)
                gave_up.append((7, f"the Lease {args.lease_namespace}/{lease_name} stayed held by "
                                   f"{holder or 'another replica'} for {patience:.0f}s, so no pass ran; another "
                                   "controller is running: use ratefit plan, or --no-leader-election"))
                loop.stop()

        threading.Thread(target=give_up, name="ratefit-once-lease", daemon=True).start()
    mode = "dry-run (forced)" if args.dry_run else "per policy (dry-run or apply)"
    print(f"ratefit run: identity {conns.kube.identity}; rates from {conns.rate_source}; sizing API {args.sizing_api}; "
          f"mode {mode}; interval {args.interval}", file=sys.stderr, flush=True)
    try:
        code = loop.run()
        if retrainer is not None and args.once:  # one pass: let its retrains finish before exiting
            retrainer.drain(timeout=900.0)
            for out in retrainer.outcomes:
                print(f"ratefit run: retrained {out.job.model}: " + (
                    f"version {out.artifact.version} replaces {out.replaced}" if out.artifact else f"failed: {out.error}"),
                    file=sys.stderr, flush=True)
        if args.once and gave_up:
            print(f"ratefit run: error: {gave_up[0][1]}", file=sys.stderr, flush=True)
            code = gave_up[0][0]
        elif args.once:
            code = _once_exit(loop, last, conns)
        return code
    finally:
        stop_watch.set()
        if retrainer is not None:
            retrainer.stop()
        if cache is not None:
            cache.stop()
        if snapshot is not None:
            snapshot.stop()
        if judge is not None:
            judge.stop()
        if health is not None:
            health.stop()
        conns.close()
        print("ratefit run: stopped", file=sys.stderr, flush=True)


def _once_exit(loop: Any, last: list[Any], conns: Connections) -> int:
    """The exit code of ``run --once`` (see ``controller/exit_status``), summary on stderr."""
    from ratefit.controller.exit_status import ExitCode, pass_exit, prometheus_probe, sizing_probe

    if not last:
        if loop.stopping:
            return 0  # stopped by a signal before the pass
        print("ratefit run: error: the pass failed (see the log above)", file=sys.stderr, flush=True)
        return int(ExitCode.FAILED)
    verdict = pass_exit(last[0], prometheus=prometheus_probe(conns.rates), sizing=sizing_probe(conns.sizing))
    if verdict.code is not ExitCode.OK:
        print(f"ratefit run: error: {verdict.summary}", file=sys.stderr, flush=True)
    return int(verdict.code)


def check_limits(args: argparse.Namespace) -> None:
    """Negative budgets are refused (0 is the documented 'unlimited')."""
    if args.budget_per_minute < 0:
        raise InputError(f"--budget-per-minute {args.budget_per_minute:g}: must be 0 (unlimited) or positive")
    if args.max_rollouts < 0:
        raise InputError(f"--max-rollouts {args.max_rollouts}: must be 0 (unlimited) or positive")


class OnceElector:
    """The Lease elector of ``run --once``: calls ``on_first_miss`` once, after the first
    attempt that did not get the Lease; everything else is the wrapped elector's."""

    def __init__(self, inner: Any, on_first_miss: Any) -> None:
        self._inner = inner
        self._on_first_miss = on_first_miss
        self._checked = False

    def try_acquire_or_renew(self) -> bool:
        try:
            held = bool(self._inner.try_acquire_or_renew())
        except Exception:
            self._miss()
            raise
        if not held:
            self._miss()
        return held

    def _miss(self) -> None:
        if not self._checked:
            self._checked = True
            self._on_first_miss()

    def release(self) -> None:
        self._inner.release()

    def __getattr__(self, name: str) -> Any:
        return getattr(self._inner, name)


def lease_namespace_problem(kube: Any, namespace: str) -> tuple[int, str] | None:
    """(exit code, one line) when the Lease namespace does not exist (2) or the API server
    does not answer (3); None when it exists or cannot be read (403: benefit of the doubt)."""
    from ratefit.controller.kube_probe import probe

    code, body = probe(kube.api_client, f"namespace:{namespace}")
    if code == 404:
        return 2, (f"--once: the Lease namespace {namespace} does not exist; pass --no-leader-election "
                   f"for a one-off run (or --lease-namespace NS, or kubectl create namespace {namespace})")
    if code == 0:
        first = " ".join(str(body).split())[:200]
        return 3, (f"the Kubernetes API server could not be reached ({first}); check --kubeconfig/--context "
                   "and that the cluster is up")
    return None


def parse_shard(text: str | None) -> tuple[int, int] | None:
    """``"1/4"`` → (1, 4): shard index 1 of 4."""
    if not text:
        return None
    i, sep, n = text.partition("/")
    try:
        index, count = int(i), int(n)
    except ValueError:
        index, count = -1, 0
    if not sep or count < 1 or not 0 <= index < count:
        raise InputError(f"--shard {text!r}: write I/N with 0 <= I < N, e.g. 0/2")
    return index, count


def _after_sync(cache: Any, run_pass: Any) -> Any:
    """``run_pass`` that first waits for the cache's first sync. Every half second it
    checks for a stop and keeps the Lease (``may_act`` renews it when due); stopped or
    no longer leader before the sync, the pass fails with CacheNotSynced and the loop
    carries on (ends, or stands by)."""

    def run(control: Any) -> Any:
        from ratefit.controller.kube_cache import CacheNotSynced

        while not cache.wait_synced(0.5):
            if control is not None and control.should_stop():
                raise CacheNotSynced("stopped before the watch-fed cache had synced")
            if control is not None and not control.may_act():
                raise CacheNotSynced("lost the leader Lease while waiting for the watch-fed cache to sync")
        return run_pass(control)

    return run
