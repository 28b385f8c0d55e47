"""``ratefit check``: a checklist of everything the first reconcile pass needs, each line
OK / WARN / FAIL with the fix.

The checks, in order (a later check that needs an earlier one's part is skipped when that
part is down — the earlier FAIL already says why):

1. kubeconfig and context: the API server answers ``/version``;
2. the CRD: discovery serves ``ratefit.dev/v1alpha1`` with ``sizingpolicies`` and its
   ``status`` subresource (the version this build reads and writes);
3. permissions: one SelfSubjectAccessReview per entry of
   ``controller/permissions.all_permissions()`` — for the identity of the kubeconfig, so run
   it with the controller's own (e.g. a token of its ServiceAccount) to check its RBAC;
4. the Lease namespace exists;
5. the SizingPolicies parse (an invalid one is a FAIL naming the field);
6. Prometheus answers a query;
7. per policy container: cAdvisor CPU series for the workload's pods
   (``controller/workload_queries``);
8. per policy container: a request rate, with the exact query the controller will send
   (printed) — the same rate source, preset and namespace guard as ``ratefit run``;
9. the sizing API is ready and accepts the token (or ``--store DIR`` is read directly);
10. per policy container: its model exists and the current rate is inside its trained range.

Pure assembly: the parts (Kubernetes adapter, Prometheus client, rate source, sizing client
or store) are passed in; every failure of a part becomes a line, never an exception.
"""

from __future__ import annotations

import json
from collections.abc import Callable, Iterable, Sequence
from dataclasses import asdict, dataclass, field
from enum import StrEnum
from typing import Any

from ratefit.controller.permissions import Permission, all_permissions
from ratefit.controller.policy import GROUP, KIND, PLURAL, VERSION, Policy, PolicyInvalid, format_duration, parse_policy

__all__ = ["Status", "CheckLine", "CheckParts", "run_checks", "render_text", "render_json", "exit_code"]


class Status(StrEnum):
    OK = "OK"
    WARN = "WARN"
    FAIL = "FAIL"


@dataclass(frozen=True, slots=True)
class CheckLine:
    """One line of the checklist. ``subject``: the policy/container it is about ('' for the set-up)."""

    check: str
    status: Status
    detail: str
    fix: str = ""
    subject: str = ""
    query: str = ""


@dataclass
class CheckParts:
    """What the checks talk to (built by ``commands/check.py``; each may be None when it
    could not be built — ``errors`` says why, keyed by part)."""

    kube: Any = None  # controller/kube.KubeAdapter
    prometheus: Any = None  # models/prometheus.PrometheusClient
    rates: Any = None  # metrics_source.PrometheusRateSource on that client
    sizing: Any = None  # sizing_client.SizingClient
    store: Any = None  # models/store.ModelStore (--store instead of --sizing-api)
    namespaces: tuple[str, ...] = ()
    lease_namespace: str = "ratefit-system"
    at: float | None = None
    errors: dict[str, str] = field(default_factory=dict)


def _kube_get(kube: Any, what: str) -> tuple[int, Any]:
    from ratefit.controller.kube_probe import probe

    return probe(kube.api_client, what)


def ssar_body(p: Permission, namespace: str) -> dict[str, Any]:
    """A SelfSubjectAccessReview (authorization.k8s.io/v1) asking for ``p`` in ``namespace``
    ('' = all namespaces)."""
    res, sub = p.split
    attrs: dict[str, Any] = {"group": p.group, "resource": res, "verb": p.verb}
    if sub:
        attrs["subresource"] = sub
    if namespace:
        attrs["namespace"] = namespace
    return {"apiVersion": "authorization.k8s.io/v1", "kind": "SelfSubjectAccessReview",
            "spec": {"resourceAttributes": attrs}}


# ---------------------------------------------------------------------------------- checks


def check_cluster(parts: CheckParts) -> list[CheckLine]:
    if parts.kube is None:
        return [CheckLine("kubeconfig", Status.FAIL, parts.errors.get("kube", "no cluster connection"),
                          "pass --kubeconfig FILE (and --context NAME) for the cluster, or run inside it")]
    code, body = _kube_get(parts.kube, "version")
    host = getattr(parts.kube.api_client.configuration, "host", "?")
    if code != 200:
        return [CheckLine("kubeconfig", Status.FAIL, f"the API server at {host} did not answer /version ({code}: {str(body)[:200]})",
                          "check the kubeconfig's server address, credentials and --context; is the cluster up?")]
    version = body.get("gitVersion", "?") if isinstance(body, dict) else "?"
    return [CheckLine("kubeconfig", Status.OK, f"API server {host} answers (Kubernetes {version})")]


def check_crd(parts: CheckParts) -> list[CheckLine]:
    code, body = _kube_get(parts.kube, f"group:{GROUP}/{VERSION}")
    fix = "install the CRD: kubectl apply -k manifests/crd"
    if code == 404:
        return [CheckLine("crd", Status.FAIL, f"the API server does not serve {GROUP}/{VERSION}", fix)]
    if code != 200 or not isinstance(body, dict):
        return [CheckLine("crd", Status.FAIL, f"discovery of {GROUP}/{VERSION} failed ({code}: {str(body)[:200]})", fix)]
    names = {r.get("name") for r in body.get("resources") or []}
    missing = [n for n in (PLURAL, f"{PLURAL}/status") if n not in names]
    if missing:
        return [CheckLine("crd", Status.FAIL, f"{GROUP}/{VERSION} is served without {', '.join(missing)}",
                          fix + " (this build expects the status subresource)")]
    return [CheckLine("crd", Status.OK, f"{PLURAL}.{GROUP} served at {VERSION} with its status subresource")]


def check_permissions(parts: CheckParts, permissions: Iterable[Permission] | None = None) -> list[CheckLine]:
    perms = tuple(permissions if permissions is not None else all_permissions())
    scopes = list(parts.namespaces) or [""]
    denied: list[CheckLine] = []
    asked = 0
    for p in perms:
        for ns in ([parts.lease_namespace] if p.lease else scopes):
            code, body = _kube_get(parts.kube, "ssar:" + json.dumps(ssar_body(p, ns)))
            if code in (404, 405):
                return [CheckLine("permissions", Status.WARN,
                                  "the API server does not answer SelfSubjectAccessReview; permissions not checked",
                                  "check the ClusterRole in manifests/base/rbac.yaml is bound to the controller")]
            if code not in (200, 201) or not isinstance(body, dict):
                return [CheckLine("permissions", Status.FAIL,
                                  f"SelfSubjectAccessReview failed ({code}: {str(body)[:200]})",
                                  "the kubeconfig's user must be allowed to create selfsubjectaccessreviews "
                                  "(every authenticated user is, by default)")]
            asked += 1
            status = body.get("status") or {}
            if not status.get("allowed"):
                where = f"in namespace {ns}" if ns else "in all namespaces"
                why = status.get("reason") or status.get("evaluationError") or "not allowed"
                denied.append(CheckLine(
                    "permission", Status.FAIL, f"{p.text} {where}: denied ({why})",
                    "apply manifests/base/rbac.yaml and bind it to the identity the controller runs as"
                    + (f" (the Lease Role lives in {parts.lease_namespace})" if p.lease else ""),
                ))
    if denied:
        return denied
    return [CheckLine("permissions", Status.OK,
                      f"all {len(perms)} permissions the controller needs are granted ({asked} reviews, for the "
                      "kubeconfig's identity: run check as the controller's ServiceAccount to check its own)")]


def check_lease_namespace(parts: CheckParts) -> list[CheckLine]:
    ns = parts.lease_namespace
    code, body = _kube_get(parts.kube, f"namespace:{ns}")
    if code == 200:
        return [CheckLine("lease namespace", Status.OK, f"namespace {ns} exists (the leader Lease lives there)")]
    if code == 404:
        return [CheckLine("lease namespace", Status.FAIL, f"namespace {ns} does not exist",
                          f"kubectl create namespace {ns} (or apply manifests/base), or pass --lease-namespace")]
    return [CheckLine("lease namespace", Status.WARN, f"cannot read namespace {ns} ({code}: {str(body)[:120]})",
                      "reading namespaces is not needed by the controller; check it exists by hand")]


def load_policies(parts: CheckParts) -> tuple[list[Policy], list[CheckLine]]:
    from ratefit.models.errors import RatefitError

    try:
        listed = parts.kube.list_policies(list(parts.namespaces) or None)
    except RatefitError as exc:
        return [], [CheckLine("policies", Status.FAIL, f"cannot list SizingPolicies: {exc}",
                              "check the CRD and the permission to list sizingpolicies")]
    policies, lines = [], []
    for obj in listed.items:
        try:
            policies.append(parse_policy({"apiVersion": f"{GROUP}/{VERSION}", "kind": KIND, "spec": dict(obj.spec or {}),
                                          "metadata": {"namespace": obj.namespace, "name": obj.name,
                                                       "generation": obj.generation}}))
        except PolicyInvalid as exc:
            lines.append(CheckLine("policy", Status.FAIL, str(exc), "fix the field named; the controller never acts "
                                   "on an invalid policy", subject=f"{obj.namespace}/{obj.name}"))
    if not listed.items:
        where = ", ".join(parts.namespaces) or "any namespace"
        lines.append(CheckLine("policies", Status.WARN, f"no SizingPolicy in {where}",
                               "write one (manifests/examples/) and kubectl apply it"))
    elif policies:
        lines.append(CheckLine("policies", Status.OK, f"{len(policies)} SizingPolicies parse "
                               f"({len(listed.items) - len(policies)} invalid)"))
    return policies, lines


def check_prometheus(parts: CheckParts) -> list[CheckLine]:
    from ratefit.models.errors import PrometheusError

    if parts.prometheus is None:
        return [CheckLine("prometheus", Status.FAIL, parts.errors.get("prometheus", "no Prometheus given"),
                          "pass --prometheus URL (e.g. http://127.0.0.1:9090 through kubectl port-forward)")]
    try:
        got = parts.prometheus.query("vector(1)", at=parts.at)
    except PrometheusError as exc:
        return [CheckLine("prometheus", Status.FAIL, str(exc), "check --prometheus URL and that the server is up")]
    if len(got) != 1 or got[0].value != 1.0:
        return [CheckLine("prometheus", Status.FAIL, f"vector(1) answered {got!r}", "is --prometheus a Prometheus?")]
    return [CheckLine("prometheus", Status.OK, f"{parts.prometheus.base_url} answers queries")]


def _requests(policies: Sequence[Policy]) -> list[Any]:
    from ratefit.controller.metrics_source import RateRequest

    return [RateRequest(namespace=p.namespace, policy=p.name, workload=p.workload_name, container=c.name,
                        query=c.rate_query, rate_window=format_duration(p.rate_window_s),
                        percentile=p.rate_percentile, workload_kind=p.workload_kind)
            for p in policies for c in p.containers]


def check_series(parts: CheckParts, policies: Sequence[Policy]) -> tuple[list[CheckLine], dict[str, float]]:
    """cAdvisor CPU series and the request rate of every policy container; → lines, and the
    rates found (key namespace/policy/container)."""
    from ratefit.controller.workload_queries import cpu_series_query
    from ratefit.models.errors import PrometheusError

    lines: list[CheckLine] = []
    for p in policies:
        for c in p.containers:
            subject = f"{p.namespace}/{p.name}/{c.name}"
            q = f"count by (pod) ({cpu_series_query(p.namespace, p.workload_kind, p.workload_name, c.name)})"
            try:
                pods = parts.prometheus.query(q, at=parts.at)
            except PrometheusError as exc:
                lines.append(CheckLine("cpu series", Status.FAIL, str(exc), "check Prometheus", subject, q))
                continue
            if pods:
                lines.append(CheckLine("cpu series", Status.OK, f"cAdvisor CPU series for {len(pods)} pods of "
                                       f"{p.workload_kind} {p.workload_name}", "", subject, q))
            else:
                lines.append(CheckLine(
                    "cpu series", Status.FAIL,
                    f"no cAdvisor CPU series for container {c.name} of {p.workload_kind} {p.workload_name}",
                    "check Prometheus scrapes the kubelets' /metrics/cadvisor (labels namespace, pod, container) "
                    "and that the workload runs", subject, q))
    rates: dict[str, float] = {}
    reqs = _requests(policies)
    if not reqs:
        return lines, rates
    got = parts.rates.per_pod_rates(reqs)
    for r in reqs:
        res = got.get(r.key)
        q = parts.rates.query_for(r)
        if res is not None and not res.missing:
            rates[r.key] = float(res.rate)
            lines.append(CheckLine("request rate", Status.OK,
                                   f"{res.rate:.4g} req/s (the busiest of {len(res.pod_rates)} pods, p{r.percentile:g} "
                                   f"over {r.rate_window})", "", r.key, q))
            continue
        why = res.why if res is not None else "NoMetrics"
        msg = res.message if res is not None else "no answer"
        fixes = {
            "QueryRefused": "give every selector of the rateQuery namespace=\"%s\"" % r.namespace,
            "TooManySeries": "narrow the rateQuery to one series per pod of the workload",
            "QueryFailed": "fix the rateQuery (Prometheus' error above)",
        }
        lines.append(CheckLine("request rate", Status.FAIL, f"{why}: {msg}",
                               fixes.get(why, "instrument the workload, or pick the --rate-preset (or rateQuery) "
                                              "that matches its request counter"), r.key, q))
    return lines, rates


def check_sizing(parts: CheckParts) -> tuple[list[CheckLine], dict[str, tuple[float, float]] | None]:
    """The sizing API (ready, token accepted) or the store; → lines, and key → trained rate range."""
    from ratefit.models.errors import RatefitError

    if parts.store is not None:
        loaded = parts.store.load_all()
        ranges = {k: (float(a.rate_range[0]), float(a.rate_range[1])) for k, a in loaded.artifacts.items()}
        refused = loaded.errors
        status = Status.WARN if refused else Status.OK
        return [CheckLine("model store", status, f"{parts.store.root}: {len(ranges)} models"
                          + (f", {len(refused)} files refused" if refused else ""),
                          "retrain or remove the refused files" if refused else "")], ranges
    if parts.sizing is None:
        return [CheckLine("sizing api", Status.FAIL, parts.errors.get("sizing", "no sizing API given"),
                          "pass --sizing-api URL (ratefit serve) or --store DIR")], None
    try:
        health = parts.sizing.health()
    except RatefitError as exc:
        return [CheckLine("sizing api", Status.FAIL, str(exc), "start ratefit serve and pass its URL")], None
    try:
        models = parts.sizing.models()
    except RatefitError as exc:
        status = getattr(exc, "status", None)
        if status in (401, 403):
            return [CheckLine("sizing api", Status.FAIL, f"the token was refused (HTTP {status})",
                              "pass --sizing-token-file with the token ratefit serve was started with")], None
        return [CheckLine("sizing api", Status.FAIL, str(exc), "check the sizing API")], None
    line = CheckLine("sizing api", Status.OK if health.ready else Status.WARN,
                     f"{parts.sizing.base_url} {'ready' if health.ready else 'NOT ready'}, {len(models)} models"
                     + (f", {health.refused_count} models refused" if health.refused_count else ""),
                     "" if health.ready else "the API serves no model yet: train, then POST /v1/reload")
    return [line], {m.model: m.rate_range for m in models}


def check_models(policies: Sequence[Policy], rates: dict[str, float],
                 ranges: dict[str, tuple[float, float]]) -> list[CheckLine]:
    lines = []
    for p in policies:
        for c in p.containers:
            subject = f"{p.namespace}/{p.name}/{c.name}"
            rng = ranges.get(c.model)
            if rng is None:
                lines.append(CheckLine("model", Status.FAIL, f"no model {c.model}",
                                       "train it: ratefit train --from-policies (or ratefit train for this key)", subject))
                continue
            rate = rates.get(subject)
            lo, hi = rng
            if rate is None:
                lines.append(CheckLine("model", Status.OK, f"{c.model} trained on {lo:.4g}..{hi:.4g} req/s "
                                       "(no current rate to compare)", "", subject))
            elif rate > hi or rate < lo:
                held = "" if p.allow_extrapolation else "; held Extrapolated unless the policy allows extrapolation"
                lines.append(CheckLine("model", Status.WARN,
                                       f"current rate {rate:.4g} req/s is outside {c.model}'s trained range "
                                       f"{lo:.4g}..{hi:.4g}{held}", "retrain on a window that includes today's load",
                                       subject))
            else:
                lines.append(CheckLine("model", Status.OK, f"{c.model}: current rate {rate:.4g} req/s inside its "
                                       f"trained range {lo:.4g}..{hi:.4g}", "", subject))
    return lines


def run_checks(parts: CheckParts, *, permissions: Iterable[Permission] | None = None,
               progress: Callable[[CheckLine], None] | None = None) -> list[CheckLine]:
    """Every check in order; a part that is down skips the checks that need it."""
    out: list[CheckLine] = []

    def add(lines: Iterable[CheckLine]) -> list[CheckLine]:
        lines = list(lines)
        for line in lines:
            out.append(line)
            if progress:
                progress(line)
        return lines

    cluster = add(check_cluster(parts))
    kube_ok = all(line.status is Status.OK for line in cluster)
    policies: list[Policy] = []
    if kube_ok:
        crd = add(check_crd(parts))
        add(check_permissions(parts, permissions))
        add(check_lease_namespace(parts))
        if all(line.status is not Status.FAIL for line in crd):
            pols, lines = load_policies(parts)
            policies = pols
            add(lines)
    prom = add(check_prometheus(parts))
    rates: dict[str, float] = {}
    if policies and all(line.status is Status.OK for line in prom) and parts.rates is not None:
        series, rates = check_series(parts, policies)
        add(series)
    sizing, ranges = check_sizing(parts)
    add(sizing)
    if policies and ranges is not None:
        add(check_models(policies, rates, ranges))
    return out


def exit_code(lines: Sequence[CheckLine]) -> int:
    return 1 if any(line.status is Status.FAIL for line in lines) else 0


def render_text(line: CheckLine) -> str:
    who = f" [{line.subject}]" if line.subject else ""
    text = f"{line.status.value:<4}  {line.check}{who}: {line.detail}\n"
    if line.query:
        text += f"      query: {line.query.replace(chr(10), ' ')}\n"
    if line.fix and line.status is not Status.OK:
        text += f"      fix: {line.fix}\n"
    return text


def render_json(lines: Sequence[CheckLine]) -> str:
    doc = {"ok": exit_code(lines) == 0,
           "counts": {s.value: sum(1 for x in lines if x.status is s) for s in Status},
           "checks": [{**asdict(x), "status": x.status.value} for x in lines]}
    return json.dumps(doc, indent=2) + "\n"
