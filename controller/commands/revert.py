"""`ratefit revert NS/KIND/NAME` — put back the CPU requests/limits ratefit recorded
before it first changed the workload (annotation ``ratefit.dev/previous-requests``)."""

from __future__ import annotations

import argparse
import sys

from ratefit.models.errors import InputError

HELP = """\
Restore the CPU requests and limits recorded in the workload's
ratefit.dev/previous-requests annotation (what they were before ratefit first
changed each container) with one strategic-merge patch (server-side dry run
first), and remove the annotation. A template change rolls the workload.
Set the policy to `mode: DryRun` first, or the loop will propose the change again.
WORKLOAD is NAMESPACE/KIND/NAME, e.g. parcels/Deployment/label-printer
(kind: Deployment|deploy|StatefulSet|sts).
"""


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("revert", help="restore a workload's previous CPU requests", description=HELP,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("workload", metavar="NS/KIND/NAME", help="the workload, e.g. parcels/Deployment/label-printer")
    p.add_argument("--kubeconfig", metavar="FILE", help="kubeconfig (default: $KUBECONFIG, in-cluster, ~/.kube/config)")
    p.add_argument("--context", help="kubeconfig context to use")
    p.set_defaults(handler=_run)


def parse_workload(text: str) -> tuple[str, str, str]:
    parts = text.split("/")
    if len(parts) != 3 or not all(parts):
        raise InputError(f"workload {text!r}: write NAMESPACE/KIND/NAME, e.g. parcels/Deployment/label-printer")
    from ratefit.controller.workload import WorkloadKind

    return parts[0], WorkloadKind.parse(parts[1]).value, parts[2]


def _run(args: argparse.Namespace) -> int:
    from ratefit.controller.kube import KubeAdapter
    from ratefit.controller.review import fmt_m

    ns, kind, name = parse_workload(args.workload)
    kube = KubeAdapter.from_environment(args.kubeconfig, context=args.context)
    try:
        before = kube.read_workload(ns, kind, name)
        previous = before.previous_requests
        stored = kube.revert(ns, kind, name)
    finally:
        kube.close()
    if stored is None:
        print(f"{ns}/{kind}/{name}: nothing to revert (no ratefit.dev/previous-requests annotation)")
        return 0
    now = {c.name: c for c in stored.containers}
    for cname, prev in sorted(previous.items()):
        c = now.get(cname)
        if c is None:
            print(f"{ns}/{kind}/{name} {cname}: container is gone; skipped", file=sys.stderr)
            continue
        print(f"{ns}/{kind}/{name} {cname}: cpu request {fmt_m(c.cpu_request_m)}, limit {fmt_m(c.cpu_limit_m)} (restored)")
    return 0
