"""Default PromQL for the INVENTED Kestrel Post demo scenario, per key ``namespace/workload/container``.

INVENTED DATA: ``kestrel_http_requests_total`` is the scenario's own request counter
(labels namespace, pod, workload); the CPU series carry the cAdvisor names and labels
(``container_cpu_usage_seconds_total`` etc., labels namespace/pod/container, see
DESIGN.md). Every query answers one series per pod, labelled ``namespace`` and ``pod``.

Example for ``parcels/label-printer/app`` (window ``2m``)::

    rate:     sum by (namespace, pod) (rate(kestrel_http_requests_total{namespace="parcels",workload="label-printer"}[2m]))
    cpu:      sum by (namespace, pod) (rate(container_cpu_usage_seconds_total{namespace="parcels",pod=~"label-printer-[a-z0-9]+-[a-z0-9]+",container="app"}[2m]))
    throttle: sum by (namespace, pod) (rate(container_cpu_cfs_throttled_periods_total{…}[2m]))
              / sum by (namespace, pod) (rate(container_cpu_cfs_periods_total{…}[2m]))

Containers without a CPU limit have no CFS series; their throttle query answers nothing
(read that as "never throttled").
"""

from __future__ import annotations

from dataclasses import dataclass

from ratefit.models.scenario.services import REQUEST_METRIC, SCENARIO, Service, service

__all__ = ["ScenarioQueries", "pod_regex", "rate_query", "cpu_query", "throttle_query", "queries", "default_queries"]

CPU_METRIC = "container_cpu_usage_seconds_total"
CFS_PERIODS_METRIC = "container_cpu_cfs_periods_total"
CFS_THROTTLED_METRIC = "container_cpu_cfs_throttled_periods_total"


@dataclass(frozen=True, slots=True)
class ScenarioQueries:
    key: str
    rate: str
    cpu: str
    throttle: str


def _split(key: str) -> tuple[Service, str]:
    parts = key.split("/")
    if len(parts) != 3:
        raise KeyError(f"key {key!r} must be namespace/workload/container")
    svc = service(key)
    if parts[2] not in {c.name for c in svc.containers}:
        raise KeyError(f"{svc.namespace}/{svc.workload} has no container {parts[2]!r} in the invented scenario")
    return svc, parts[2]


def pod_regex(svc: Service) -> str:
    """Regex matching the pod names of a workload (Deployment: name-hash-suffix; StatefulSet: name-ordinal)."""
    if svc.kind == "StatefulSet":
        return f"{svc.workload}-[0-9]+"
    return f"{svc.workload}-[a-z0-9]+-[a-z0-9]+"


def rate_query(key: str, *, window: str = "2m") -> str:
    """Per-pod request rate (req/s) of the key's workload."""
    svc, _ = _split(key) if key.count("/") == 2 else (service(key), "")
    return (
        f'sum by (namespace, pod) (rate({REQUEST_METRIC}{{namespace="{svc.namespace}",'
        f'workload="{svc.workload}"}}[{window}]))'
    )


def _container_selector(svc: Service, container: str) -> str:
    return f'{{namespace="{svc.namespace}",pod=~"{pod_regex(svc)}",container="{container}"}}'


def cpu_query(key: str, *, window: str = "2m") -> str:
    """Per-pod CPU usage (cores) of the key's container."""
    svc, c = _split(key)
    return f"sum by (namespace, pod) (rate({CPU_METRIC}{_container_selector(svc, c)}[{window}]))"


def throttle_query(key: str, *, window: str = "2m") -> str:
    """Per-pod throttled fraction of CFS periods of the key's container."""
    svc, c = _split(key)
    sel = _container_selector(svc, c)
    return (
        f"sum by (namespace, pod) (rate({CFS_THROTTLED_METRIC}{sel}[{window}]))"
        f" / sum by (namespace, pod) (rate({CFS_PERIODS_METRIC}{sel}[{window}]))"
    )


def queries(key: str, *, window: str = "2m") -> ScenarioQueries:
    """All three default queries of one key."""
    return ScenarioQueries(
        key=key,
        rate=rate_query(key, window=window),
        cpu=cpu_query(key, window=window),
        throttle=throttle_query(key, window=window),
    )


def default_queries(*, window: str = "2m") -> dict[str, ScenarioQueries]:
    """``{key: ScenarioQueries}`` for every key of the scenario."""
    return {k: queries(k, window=window) for s in SCENARIO for k in s.keys()}
