"""`ratefit plan` — one pass in forced dry-run that prints the review and changes NOTHING.

Not even the policies' status: `plan` only reads (policies, workloads, HPAs, rates,
sizing answers), so it is safe against any cluster at any time; every object's
resourceVersion stays as it was. Thin: wiring is shared with `ratefit run`; the exit
code comes from ``controller/exit_status``.
"""

from __future__ import annotations

import argparse
import logging
import sys

from ratefit.controller.commands.run import add_connection_flags, connect
from ratefit.controller.exit_status import EXIT_CODES_HELP

HELP = """\
Run exactly one reconcile pass in dry-run and print the review: one row per
container of every SizingPolicy with workload, container, current, proposed,
demand, demand_bound, rate, verdict, why and message (the reason in words: the
final target of a step-limited change, the missing model, what releases a hold).
Then the totals: CPU requested now and after the proposals across all replicas
(cores), the change, and the change per pod, per workload and in total.
CPU values in the rows are per pod. Nothing in the cluster changes: no patch, no
status write, no Event.

--output json prints a list of objects with those keys plus namespace, policy,
kind, mode, resize_by, replicas, millicore integers (current_m, proposed_m,
demand_m, demand_bound_m, change_per_pod_m, change_m = across all replicas),
limits and cgroup figures. --output markdown prints the same as Markdown tables.

""" + EXIT_CODES_HELP


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("plan", help="one dry-run pass: print the review, change nothing", description=HELP,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    add_connection_flags(p)
    p.add_argument("--output", "-o", choices=("table", "json", "markdown"), default="table",
                   help="review format (default %(default)s)")
    p.set_defaults(handler=_run)


def _run(args: argparse.Namespace) -> int:
    from ratefit.controller.exit_status import ExitCode, pass_exit, prometheus_probe, sizing_probe
    from ratefit.controller.reconcile import ReconcileConfig, Reconciler
    from ratefit.controller.review import render

    # plan prints its own summary and warnings: the pass's log lines would say it all twice
    logging.getLogger("ratefit").addHandler(logging.NullHandler())
    logging.getLogger("ratefit").propagate = False
    logging.getLogger("urllib3").setLevel(logging.ERROR)
    conns = connect(args)
    try:
        rec = Reconciler(kube=conns.kube, rates=conns.rates, sizing=conns.sizing, usage=conns.usage,
                         config=ReconcileConfig(dry_run=True, write=False, namespaces=tuple(args.namespace)))
        result = rec.run_pass()
        verdict = pass_exit(result, prometheus=prometheus_probe(conns.rates), sizing=sizing_probe(conns.sizing))
    finally:
        conns.close()
    if verdict.code is ExitCode.CLUSTER_UNREACHABLE and not result.rows:
        print(f"ratefit plan: error: {verdict.summary}", file=sys.stderr)
        return int(verdict.code)
    print(f"ratefit plan: rates from {conns.rate_source}; {result.policies} policies "
          f"({result.invalid} invalid); nothing was changed", file=sys.stderr)
    for err in result.errors:
        print(f"ratefit plan: warning: {err}", file=sys.stderr)
    sys.stdout.write(render(result.rows, args.output))
    if verdict.code is not ExitCode.OK:
        print(f"ratefit plan: error: {verdict.summary}", file=sys.stderr)
    return int(verdict.code)
