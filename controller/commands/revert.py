"""`ratefit revert KIND/NAME -n NAMESPACE` — put back the CPU requests/limits ratefit
recorded before it first changed the workload (annotation ``ratefit.dev/previous-requests``)."""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any

from ratefit.models.errors import InputError

HELP = """\
Restore the CPU requests and limits recorded in the workload's
ratefit.dev/previous-requests annotation (what they were before ratefit first
changed each container) with one strategic-merge patch (server-side dry run
first), and remove the annotation. A template change rolls the workload.
Set the policy to mode DryRun first, or the loop will propose the change again.

The workload is named as kubectl names it: KIND/NAME with -n NAMESPACE, e.g.
  ratefit revert deployment/label-printer -n parcels
(kind: Deployment, deployment, deploy, StatefulSet, statefulset, sts). Without -n
the namespace of the kubeconfig's context is used, else "default".
"""


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("revert", help="restore a workload's previous CPU requests", description=HELP,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("workload", metavar="KIND/NAME", help="the workload, e.g. deployment/label-printer")
    p.add_argument("--namespace", "-n", metavar="NAMESPACE",
                   help="the workload's namespace (default: the kubeconfig context's, else default)")
    p.add_argument("--kubeconfig", metavar="FILE", help="kubeconfig (default: $KUBECONFIG, in-cluster, ~/.kube/config)")
    p.add_argument("--context", help="kubeconfig context to use")
    p.add_argument("--output", "-o", choices=("table", "json", "markdown"), default="table",
                   help="output format (default %(default)s)")
    p.set_defaults(handler=_run)


def parse_workload(text: str, namespace: str | None = None) -> tuple[str | None, str, str]:
    """``KIND/NAME`` (and -n) → (namespace or None, Kind, name). The older
    ``NAMESPACE/KIND/NAME`` is still read when -n is not given."""
    from ratefit.controller.workload import WorkloadKind

    parts = text.split("/")
    if len(parts) == 3 and namespace is None and all(parts):
        namespace, parts = parts[0], parts[1:]
    if len(parts) != 2 or not all(parts):
        raise InputError(f"workload {text!r}: write KIND/NAME with -n NAMESPACE, "
                         "e.g. deployment/label-printer -n parcels")
    return namespace, WorkloadKind.parse(parts[0]).value, parts[1]


def _context_namespace(args: argparse.Namespace) -> str:
    """The namespace of the kubeconfig's context (as kubectl does), else ``default``."""
    import os

    import yaml

    path = args.kubeconfig or (os.environ.get("KUBECONFIG") or "").split(os.pathsep)[0] \
        or os.path.expanduser("~/.kube/config")
    try:
        with open(path, encoding="utf-8") as fh:
            doc = yaml.safe_load(fh) or {}
        name = args.context or doc.get("current-context")
        ctx = next((c for c in doc.get("contexts") or [] if isinstance(c, dict) and c.get("name") == name), {})
        ns = (ctx.get("context") or {}).get("namespace")
        return str(ns) if ns else "default"
    except Exception:  # in-cluster or unreadable: the adapter has reported a bad kubeconfig already
        return "default"


def _run(args: argparse.Namespace) -> int:
    from ratefit.controller.commands.run import kube_from_args
    from ratefit.controller.review import fmt_m

    ns, kind, name = parse_workload(args.workload, args.namespace)
    kube = kube_from_args(args)
    if ns is None:
        ns = _context_namespace(args)
    try:
        before = kube.read_workload(ns, kind, name)
        previous = before.previous_requests
        stored = kube.revert(ns, kind, name)
    finally:
        kube.close()
    where = f"{ns}/{kind}/{name}"
    rows: list[dict[str, Any]] = []
    if stored is not None:
        now = {c.name: c for c in stored.containers}
        for cname, _prev in sorted(previous.items()):
            c = now.get(cname)
            if c is None:
                print(f"{where} {cname}: container is gone; skipped", file=sys.stderr)
                continue
            rows.append({"workload": where, "container": cname, "cpu_request": fmt_m(c.cpu_request_m),
                         "cpu_limit": fmt_m(c.cpu_limit_m)})
    if args.output == "json":
        print(json.dumps({"workload": where, "reverted": stored is not None, "containers": rows}, indent=2))
    elif stored is None:
        print(f"{where}: nothing to revert (no ratefit.dev/previous-requests annotation)")
    elif args.output == "markdown":
        print("| workload | container | cpu request | cpu limit |")
        print("|---|---|---:|---:|")
        for r in rows:
            print(f"| {r['workload']} | {r['container']} | {r['cpu_request']} | {r['cpu_limit']} |")
    else:
        for r in rows:
            print(f"{r['workload']} {r['container']}: cpu request {r['cpu_request']}, limit {r['cpu_limit']} (restored)")
    return 0
