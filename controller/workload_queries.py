"""The three PromQL queries of one container, derived from its workload (never typed by the user).

For a container ``C`` of the workload ``KIND NAME`` in namespace ``NS`` (``RX`` = the
workload's pod-name regex, ``controller/pod_names``; ``R`` = the rate interval):

* rate — the request counter of the rate template (a preset, ``controller/rate_presets``)::

      sum by (namespace, pod) (rate(M{namespace="NS",pod=~"RX"}[R]))

* cpu — cores used, from the kubelet's cAdvisor series::

      sum by (namespace, pod) (rate(container_cpu_usage_seconds_total{namespace="NS",pod=~"RX",container="C"}[R]))

* throttle — the fraction of CFS periods in which the container was throttled::

      sum by (namespace, pod) (rate(container_cpu_cfs_throttled_periods_total{…same…}[R]))
        / sum by (namespace, pod) (rate(container_cpu_cfs_periods_total{…same…}[R]))

cAdvisor facts (DESIGN.md "Kubernetes facts"; cAdvisor's Prometheus metrics): the series carry
``namespace``, ``pod`` and ``container`` labels; pod-level series have ``container=""`` (and
some runtimes report the sandbox as ``container="POD"``), so selecting one container by name
also filters ``container!=""`` — no double counting. The CFS series exist only for
containers with a CPU limit (a CFS quota): a container without one answers nothing to the
throttle query, read as never throttled.

Every query answers one series per pod labelled ``namespace`` and ``pod`` — the shape
``models.samples`` joins on. ``ratefit train --from-policies`` and ``ratefit check`` call
:func:`container_queries`.
"""

from __future__ import annotations

from dataclasses import dataclass

from ratefit.controller.rate_template import RateTemplate
from ratefit.controller.pod_names import pod_name_regex, promql_string
from ratefit.models.durations import parse_duration

__all__ = [
    "CPU_METRIC",
    "CFS_PERIODS_METRIC",
    "CFS_THROTTLED_METRIC",
    "ContainerQueries",
    "cpu_query",
    "throttle_query",
    "container_queries",
    "cpu_series_query",
    "normalised_rate_query",
    "PolicyQueries",
    "queries_for_policy",
]

CPU_METRIC = "container_cpu_usage_seconds_total"
CFS_PERIODS_METRIC = "container_cpu_cfs_periods_total"
CFS_THROTTLED_METRIC = "container_cpu_cfs_throttled_periods_total"


@dataclass(frozen=True, slots=True)
class ContainerQueries:
    """The rate, CPU and throttling queries of one container (one series per pod each)."""

    namespace: str
    kind: str
    workload: str
    container: str
    rate: str
    cpu: str
    throttle: str


def _selector(namespace: str, kind: str | None, workload: str, container: str) -> str:
    if not container:
        raise ValueError("a container name is required (cAdvisor's container=\"\" series is the whole pod)")
    return (f'{{namespace="{promql_string(namespace)}",pod=~"{promql_string(pod_name_regex(kind, workload))}",'
            f'container="{promql_string(container)}"}}')


def cpu_query(namespace: str, kind: str | None, workload: str, container: str, *, interval: str = "2m") -> str:
    """Per-pod CPU usage (cores) of one container."""
    parse_duration(interval, field="rate interval")
    return f"sum by (namespace, pod) (rate({CPU_METRIC}{_selector(namespace, kind, workload, container)}[{interval}]))"


def throttle_query(namespace: str, kind: str | None, workload: str, container: str, *, interval: str = "2m") -> str:
    """Per-pod throttled fraction of CFS periods (0..1) of one container."""
    parse_duration(interval, field="rate interval")
    sel = _selector(namespace, kind, workload, container)
    return (f"sum by (namespace, pod) (rate({CFS_THROTTLED_METRIC}{sel}[{interval}]))"
            f" / sum by (namespace, pod) (rate({CFS_PERIODS_METRIC}{sel}[{interval}]))")


def cpu_series_query(namespace: str, kind: str | None, workload: str, container: str) -> str:
    """The raw cAdvisor CPU series of one container's pods (``ratefit check``: are they there?)."""
    return f"{CPU_METRIC}{_selector(namespace, kind, workload, container)}"


def normalised_rate_query(template: RateTemplate, namespace: str, kind: str | None, workload: str) -> str:
    """The template's per-workload rate query with its series labelled ``namespace`` and
    ``pod`` whatever the counter's own label names (``label_replace``), so it joins the
    cAdvisor queries pod by pod."""
    q = template.for_workload(namespace, kind, workload)
    renames = [(new, old) for new, old in (("namespace", template.namespace_label), ("pod", template.pod_label))
               if new != old]
    if not renames:
        return q
    for new, old in renames:
        q = f'label_replace({q}, "{new}", "$1", "{old}", "(.*)")'
    return f"sum by (namespace, pod) ({q})"


def container_queries(namespace: str, kind: str, workload: str, container: str, *,
                      template: RateTemplate = RateTemplate(), interval: str | None = None) -> ContainerQueries:
    """All three queries of one container; ``interval`` defaults to the template's."""
    iv = interval or template.interval
    tpl = template if iv == template.interval else RateTemplate(
        metric=template.metric, namespace_label=template.namespace_label, workload_label=template.workload_label,
        pod_label=template.pod_label, interval=iv, matchers=template.matchers)
    return ContainerQueries(
        namespace=namespace, kind=kind, workload=workload, container=container,
        rate=normalised_rate_query(tpl, namespace, kind, workload),
        cpu=cpu_query(namespace, kind, workload, container, interval=iv),
        throttle=throttle_query(namespace, kind, workload, container, interval=iv),
    )


@dataclass(frozen=True, slots=True)
class PolicyQueries:
    """What training needs for one container of a SizingPolicy: the model key to write and
    the container's three queries (the rate from the policy's own ``rateQuery`` when set)."""

    model: str
    queries: ContainerQueries


def queries_for_policy(policy, *, template: RateTemplate = RateTemplate(), interval: str | None = None,
                       guard=None) -> list[PolicyQueries]:
    """Every container of ``policy`` (``controller/policy.Policy``) with its queries, for
    ``ratefit train --from-policies``. A container's own ``rateQuery`` is used as written,
    after ``guard`` (``promql_guard.QueryGuard``; default: the namespace boundary) —
    it raises ``QueryRefused`` naming the selector for a query reaching outside the
    policy's namespace, as the controller would refuse it."""
    from dataclasses import replace

    from ratefit.controller.promql_guard import QueryGuard

    guard = guard if guard is not None else QueryGuard()
    out = []
    for c in policy.containers:
        q = container_queries(policy.namespace, policy.workload_kind, policy.workload_name, c.name,
                              template=template, interval=interval)
        if c.rate_query is not None:
            guard.check(c.rate_query, policy.namespace)
            q = replace(q, rate=c.rate_query)
        out.append(PolicyQueries(model=c.model, queries=q))
    return out
