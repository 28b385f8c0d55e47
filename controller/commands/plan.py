"""`ratefit plan` — one pass in forced dry-run that prints the review and changes NOTHING.

Not even the policies' status: `plan` only reads (policies, workloads, HPAs, rates,
sizing answers), so it is safe against any cluster at any time; every object's
resourceVersion stays as it was. Thin: wiring is shared with `ratefit run`.
"""

from __future__ import annotations

import argparse
import sys

from ratefit.controller.commands.run import add_connection_flags, connect

HELP = """\
Run exactly one reconcile pass in dry-run and print the review: one row per
container of every SizingPolicy with workload, container, current, proposed,
demand, upper, rate, verdict and why. Nothing in the cluster changes — no patch,
no status write, no Event. --output json prints a list of objects with those keys
(plus namespace, policy, mode, method, millicore integers, limits, cgroup figures).
Exit status: 0, also when changes are proposed; 2 on bad input; 1 when the
policies could not be listed.
"""


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("plan", help="one dry-run pass: print the review, change nothing", description=HELP,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    add_connection_flags(p)
    p.add_argument("--output", "-o", choices=("table", "json", "markdown"), default="table",
                   help="review format (default %(default)s)")
    p.set_defaults(handler=_run)


def _run(args: argparse.Namespace) -> int:
    from ratefit.controller.reconcile import PassOutcome, ReconcileConfig, Reconciler
    from ratefit.controller.review import render

    conns = connect(args)
    try:
        rec = Reconciler(kube=conns.kube, rates=conns.rates, sizing=conns.sizing, usage=conns.usage,
                         config=ReconcileConfig(dry_run=True, write=False, namespaces=tuple(args.namespace)))
        result = rec.run_pass()
    finally:
        conns.close()
    print(f"ratefit plan: rates from {conns.rate_source}; {result.policies} policies "
          f"({result.invalid} invalid); nothing was changed", file=sys.stderr)
    for err in result.errors:
        print(f"ratefit plan: warning: {err}", file=sys.stderr)
    if result.outcome is PassOutcome.FAILED:
        return 1
    sys.stdout.write(render(result.rows, args.output))
    return 0
