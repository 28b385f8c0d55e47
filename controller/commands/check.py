"""`ratefit check` — a doctor before the first pass: a checklist, each line OK / WARN / FAIL
with the fix. Thin: parse, build the parts, hand them to ``controller/check``, print.
Exit 0 when nothing FAILs (WARN lines included), 1 on any FAIL, 2 on bad input.
"""

from __future__ import annotations

import argparse
import sys

from ratefit.controller.commands.run import add_connection_flags, kube_from_args, sizing_token
from ratefit.models.errors import InputError

HELP = """\
Check a set-up before the first reconcile pass. Prints one line per check,
OK / WARN / FAIL, with the fix for each problem:

  kubeconfig   the API server answers (--kubeconfig / --context)
  crd          ratefit.dev/v1alpha1 sizingpolicies (with status) is installed
  permissions  every permission the controller needs, by SelfSubjectAccessReview
               (for the kubeconfig's identity: use the controller's own to check its RBAC)
  lease        the Lease namespace (--lease-namespace) exists
  policies     every SizingPolicy parses
  prometheus   Prometheus answers (--prometheus)
  cpu series   cAdvisor CPU series exist for each policy container's pods
  request rate a rate is found for each policy container; the query the
               controller will send is printed beside it
  sizing api   ratefit serve answers and accepts the token (or --store DIR)
  model        each container's model exists; the current rate is inside its
               trained range

Takes the same connection and rate flags as ratefit plan. Changes nothing.
--output json prints {"ok": bool, "counts": {...}, "checks": [{check, status,
detail, fix, subject, query}]}. Exit status: 0 when nothing FAILs, 1 on any FAIL,
2 on bad input.
"""


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("check", help="check a set-up: cluster, CRD, permissions, metrics, models (changes nothing)",
                       description=HELP, formatter_class=argparse.RawDescriptionHelpFormatter)
    add_connection_flags(p, sizing_required=False)
    p.add_argument("--store", metavar="DIR", help="read the model store directly instead of asking --sizing-api")
    p.add_argument("--lease-namespace", default="ratefit-system",
                   help="namespace of the leader Lease (default %(default)s)")
    p.add_argument("--output", "-o", choices=("table", "json", "markdown"), default="table",
                   type=lambda v: "table" if v == "text" else v,  # "text": the spelling before "table"
                   help="format (default %(default)s)")
    p.set_defaults(handler=_run)


def build_parts(args: argparse.Namespace):
    """The parts the checks talk to; a part that cannot be built is recorded, not raised."""
    from ratefit.controller.check import CheckParts
    from ratefit.controller.kube_retry import RetryPolicy
    from ratefit.controller.metrics_source import PrometheusRateSource
    from ratefit.controller.promql_guard import QueryGuard
    from ratefit.controller.rate_presets import template_for
    from ratefit.controller.sizing_client import SizingClient
    from ratefit.models.errors import RatefitError
    from ratefit.models.prometheus import PrometheusClient
    from ratefit.models.store import ModelStore

    if args.replay:
        raise InputError("ratefit check needs --prometheus URL (a replay has no cAdvisor series to check)")
    if args.sizing_api and args.store:
        raise InputError("give --sizing-api URL or --store DIR, not both")
    if args.max_rate_series < 0:
        raise InputError("--max-rate-series must be 0 (no cap) or positive")
    template = template_for(args.rate_preset, metric=args.rate_metric, interval=args.rate_range)
    parts = CheckParts(namespaces=tuple(args.namespace), lease_namespace=args.lease_namespace, at=args.rate_at)
    try:
        # one quick try per call: a doctor reports, it does not wait out an outage
        parts.kube = kube_from_args(args, retry=RetryPolicy(max_attempts=1), request_timeout=args.timeout)
    except RatefitError as exc:
        parts.errors["kube"] = str(exc)
    if args.prometheus:
        try:
            parts.prometheus = PrometheusClient(args.prometheus, timeout=args.timeout)
        except RatefitError as exc:
            parts.errors["prometheus"] = str(exc)
        else:
            guard = QueryGuard(enforce_namespace=not args.allow_raw_rate_queries, max_series=args.max_rate_series)
            parts.rates = PrometheusRateSource(parts.prometheus, at=args.rate_at, template=template,
                                               step=args.rate_step, guard=guard)
    if args.store:
        parts.store = ModelStore(args.store)
    elif args.sizing_api:
        token = sizing_token(args)
        try:
            parts.sizing = SizingClient(args.sizing_api, timeout=args.timeout, token=token, retries=0)
        except RatefitError as exc:
            parts.errors["sizing"] = str(exc)
    return parts


def _run(args: argparse.Namespace) -> int:
    from ratefit.controller.check import exit_code, render_json, render_text, run_checks

    parts = build_parts(args)
    try:
        progress = None if args.output != "table" else (lambda line: sys.stdout.write(render_text(line)))
        lines = run_checks(parts, progress=progress)
    finally:
        for obj in (parts.sizing, parts.prometheus, parts.kube):
            if obj is not None:
                try:
                    obj.close()
                except Exception:  # closing is best effort
                    pass
    if args.output == "json":
        sys.stdout.write(render_json(lines))
    else:
        if args.output == "markdown":
            sys.stdout.write(render_markdown(lines))
        fails = sum(1 for x in lines if x.status.value == "FAIL")
        warns = sum(1 for x in lines if x.status.value == "WARN")
        print(f"ratefit check: {len(lines)} checks, {fails} FAIL, {warns} WARN", file=sys.stderr)
    return exit_code(lines)


def render_markdown(lines) -> str:
    """The checklist as a Markdown table (pipes escaped)."""

    def cell(text: str) -> str:
        return " ".join(str(text).split()).replace("|", "\\|") or "-"

    out = ["| check | status | subject | detail | fix |", "|---|---|---|---|---|"]
    out += [f"| {cell(x.check)} | {cell(x.status.value)} | {cell(x.subject)} | {cell(x.detail)} | {cell(x.fix)} |"
            for x in lines]
    return "\n".join(out) + "\n"
