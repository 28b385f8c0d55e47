"""`ratefit sandbox` — run the local stand-in Kubernetes API server until stopped."""

from __future__ import annotations

import argparse
import signal
import sys

HELP = """\
Serve a local STAND-IN for a Kubernetes API server on 127.0.0.1 (plain HTTP) and
write a kubeconfig (context ratefit-sandbox) that kubectl and the official
kubernetes Python client accept. An existing --kubeconfig file is replaced only if
the sandbox wrote it (it opens with a "# ratefit sandbox kubeconfig" line and names
only the ratefit-sandbox context); anything else is refused unless --force. It is a stand-in, not a cluster: there is no
scheduler and no kubelet — pods become Running at once on sandbox-node, an in-place
resize (pods/resize) is applied at once and shown in status.containerStatuses[].resources
(a resize beyond the pretend node's 16 CPU / 64Gi is left PodResizePending/Infeasible;
with --startup-seconds a resize is PodResizeInProgress for that long; Deferred is not
simulated), a Deployment/StatefulSet template change
replaces all its pods at once. No authentication (any token is accepted), no RBAC, no
admission webhooks, no CEL validation rules. State lives in memory and is lost on exit.

Served: discovery; namespaces, pods (+status, +resize), events (v1 and events.k8s.io/v1),
deployments, statefulsets, replicasets, horizontalpodautoscalers (autoscaling/v2),
leases, customresourcedefinitions and the custom objects of each CRD (schema enforced,
status subresource); get/list/watch/create/update/patch (strategic, merge, JSON
patch)/delete, resourceVersion conflicts, dryRun=All, label and field selectors.

Fault injection over HTTP (for tests driving a sandbox in another process):
  curl -X POST $URL/_sandbox/faults -d '{"method":"PATCH","path":"/deployments/","status":503,"count":2}'
  curl -X POST $URL/_sandbox/faults -d '{"path":"/pods","status":429,"retryAfter":1}'
  curl -X DELETE $URL/_sandbox/faults
Fields: method ("*"), path (regex searched in the URL path), status, count (null = until
cleared), latency (seconds), retryAfter, conflict (409), dropWatch (cut watch streams).
Access reviews: POST /apis/authorization.k8s.io/v1/selfsubjectaccessreviews answers
allowed (no RBAC here) unless a deny rule matches (--deny, or over HTTP:
  curl -X POST $URL/_sandbox/access -d '{"verb":"patch","group":"apps","resource":"deployments"}'
  curl -X DELETE $URL/_sandbox/access
fields verb, group, resource, subresource, namespace; "*" matches any); a denied
request gets 403 Forbidden. GET $URL/_sandbox/requests lists the last requests with
their authorization attributes (verb, group, resource, subresource, namespace).
POST $URL/_sandbox/compact forgets the watch history (next watches from an old
resourceVersion get 410 Gone).
"""


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "sandbox",
        help="run a local stand-in Kubernetes API server (for tests and demos; not a cluster)",
        description=HELP,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--port", type=int, default=0,
                   help="TCP port on 127.0.0.1 (default: a free port, printed at start)")
    p.add_argument("--host", default="127.0.0.1",
                   help="address to bind (default 127.0.0.1; the sandbox has no authentication)")
    p.add_argument("--kubeconfig", default="sandbox.kubeconfig", metavar="FILE",
                   help="where to write the kubeconfig (default ./sandbox.kubeconfig); use it "
                        "with KUBECONFIG=FILE kubectl ... An existing file is replaced only if "
                        "the sandbox wrote it (see --force)")
    p.add_argument("--force", action="store_true",
                   help="replace an existing --kubeconfig file even if the sandbox did not write it")
    p.add_argument("--load", nargs="+", default=[], metavar="PATH",
                   help="YAML/JSON manifests (files or directories, multi-document) to create "
                        "at start; CRDs and namespaces first, missing namespaces are created")
    p.add_argument("--history", type=int, default=1000,
                   help="changes kept for watches; a watch from an older resourceVersion gets "
                        "410 Gone (default 1000)")
    p.add_argument("--bookmark-interval", type=float, default=5.0, metavar="SECONDS",
                   help="how often watches with allowWatchBookmarks get a BOOKMARK (default 5)")
    p.add_argument("--startup-seconds", type=float, default=0.0, metavar="SECONDS",
                   help="pods start Pending and turn Running/Ready after this delay; rollouts "
                        "then surge and wait (Deployments) or go one pod at a time, highest "
                        "ordinal first (StatefulSets). Default 0: everything at once")
    p.add_argument("--deny", action="append", default=[], metavar="VERB:RESOURCE",
                   help="fault mode: deny VERB on RESOURCE[.GROUP][/SUBRESOURCE] (e.g. "
                        "patch:deployments.apps, patch:pods/resize, '*:leases.coordination.k8s.io'); "
                        "SelfSubjectAccessReviews (kubectl auth can-i) answer no and such requests "
                        "get 403 Forbidden. Repeatable. Default: everything is allowed")
    p.add_argument("--access-log", action="store_true",
                   help="print one line per request on stderr (method, path, status, time)")
    p.set_defaults(handler=_run)


def _run(args: argparse.Namespace) -> int:
    from ratefit.controller.sandbox import kubeconfig
    from ratefit.controller.sandbox.server import CONTEXT, SandboxServer

    from ratefit.controller.sandbox.access import parse_deny
    from ratefit.models.errors import InputError

    # refuse a user's own kubeconfig and bad flags before anything starts
    kubeconfig.check_target(args.kubeconfig, CONTEXT, force=args.force)
    try:
        deny = [parse_deny(d) for d in args.deny]
    except ValueError as exc:
        raise InputError(str(exc)) from exc
    if args.host not in ("127.0.0.1", "localhost", "::1"):
        print("ratefit sandbox: warning: binding a non-loopback address; the sandbox accepts "
              "any client without authentication", file=sys.stderr)
    sb = SandboxServer(host=args.host, port=args.port, load=args.load, history=args.history,
                       bookmark_interval=args.bookmark_interval,
                       access_log=sys.stderr if args.access_log else None,
                       startup_seconds=args.startup_seconds)
    for rule in deny:
        sb.access.deny_json(rule)
    if args.load:
        print(f"ratefit sandbox: loading {len(args.load)} path(s)…", file=sys.stderr)
    sb.start()
    path = sb.write_kubeconfig(args.kubeconfig, force=args.force)
    print(f"ratefit sandbox: serving {sb.url} (a stand-in, not a cluster)", file=sys.stderr)
    print(f"ratefit sandbox: kubeconfig written to {path}  (context ratefit-sandbox)",
          file=sys.stderr)
    print(f"  KUBECONFIG={path} kubectl get pods -A", file=sys.stderr)
    print(sb.url, flush=True)

    def _stop(signum: int, frame: object) -> None:
        raise KeyboardInterrupt

    signal.signal(signal.SIGTERM, _stop)
    try:
        sb.serve_forever()
    except KeyboardInterrupt:
        print("ratefit sandbox: stopped", file=sys.stderr)
    finally:
        sb.stop()
    return 0
