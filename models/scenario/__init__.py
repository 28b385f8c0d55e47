"""The INVENTED demo scenario: Kestrel Post, a fictional parcel company.

INVENTED DATA — Kestrel Post, its services, numbers, images and metric
``kestrel_http_requests_total`` are made up for ratefit's demo and tests.

Keys (``namespace/workload/container``), shapes and today's hand-set CPU (request/limit):

============================================  =========  =======  =====================================
key                                           kind       shape    request / limit, replicas
============================================  =========  =======  =====================================
parcels/label-printer/app                     Deploy.    linear   1000m / 2000m, 3 (over-provisioned)
parcels/label-printer/log-shipper             Deploy.    linear   200m / none     (over-provisioned)
parcels/route-planner/planner                 Deploy.    convex   500m / 1500m, 2 (under; throttled)
dispatch/tracking-api/api                     Deploy.    concave  2000m / none, 4 (HPA on CPU 70%)
dispatch/tracking-api/cache-warmer            Deploy.    linear   250m / 500m
dispatch/address-lookup/lookup                Deploy.    step     1500m / 3000m, 2 (jump at 80 req/s)
dispatch/customs-gateway/gateway              StatefulS. knee     250m / 500m, 3 (under; throttled)
============================================  =========  =======  =====================================

API:

* :data:`SCENARIO` — tuple of frozen :class:`Service` (``namespace, workload, kind,
  containers=(ContainerSpec(name, truth, request_m, limit_m, memory), …), replicas,
  rate_profile, description, warmup_s, warmup_cores, hpa_on_cpu, restart_at``);
  :func:`service` finds one by key or workload name; ``Service.keys()``.
* :func:`generate_samples` ``(*, seed=0, hours=48, step_s=30, services=None, end=None)``
  → list of :class:`SampleRow` ``(key, namespace, workload, container, pod, timestamp,
  rate, cpu, throttled)``.
* :func:`write_csv` ``(dir, *, seed, hours, step_s, services, end)`` → ``{key: path}``;
  columns ``timestamp,pod,rate,cpu,throttled``.
* :func:`write_openmetrics` ``(path, *, end, hours=48, step_s=30, seed=0, services=None)``
  → :class:`HistoryInfo` ``(path, start, end, step_s, series, samples)``.
* :func:`rate_query` / :func:`cpu_query` / :func:`throttle_query` ``(key, *, window="2m")``,
  :func:`queries`, :func:`default_queries`: the default PromQL per key.
* :func:`write_manifests` ``(dir)`` → ``{file name: path}`` (Namespaces, workloads, an HPA);
  :func:`manifest_objects` gives the same as dicts.
"""

from __future__ import annotations

from ratefit.models.scenario.generate import DEFAULT_END, PodTrack, SampleRow, csv_name, generate_samples, simulate, write_csv
from ratefit.models.scenario.manifests import manifest_objects, write_manifests
from ratefit.models.scenario.openmetrics import HistoryInfo, write_openmetrics
from ratefit.models.scenario.queries import ScenarioQueries, cpu_query, default_queries, pod_regex, queries, rate_query, throttle_query
from ratefit.models.scenario.services import (
    HPA_TARGET_UTILISATION,
    ORGANISATION,
    REQUEST_METRIC,
    SCENARIO,
    ContainerSpec,
    RateProfile,
    Service,
    service,
)
from ratefit.models.scenario.truth import Shape, Truth

__all__ = [
    "SCENARIO", "Service", "ContainerSpec", "RateProfile", "Shape", "Truth", "service",
    "ORGANISATION", "REQUEST_METRIC", "HPA_TARGET_UTILISATION", "DEFAULT_END",
    "SampleRow", "PodTrack", "simulate", "generate_samples", "write_csv", "csv_name",
    "HistoryInfo", "write_openmetrics",
    "ScenarioQueries", "rate_query", "cpu_query", "throttle_query", "queries", "default_queries", "pod_regex",
    "manifest_objects", "write_manifests",
]
