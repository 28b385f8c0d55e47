"""The services of the INVENTED Kestrel Post demo scenario (a fictional parcel company).

INVENTED DATA: Kestrel Post, its services, images and numbers are made up for ratefit's
demo and tests; they describe no real company or system.

Each :class:`Service` is one workload (Deployment or StatefulSet) with 1–2 containers, the
hand-set CPU requests/limits it runs with today (most far above need, two below need and
throttled at the daily peak), its replica count and its daily request-rate profile.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ratefit.models.scenario.truth import Shape, Truth

__all__ = [
    "ContainerSpec",
    "RateProfile",
    "Spike",
    "Service",
    "SCENARIO",
    "ORGANISATION",
    "REQUEST_METRIC",
    "HPA_TARGET_UTILISATION",
    "service",
]

#: The invented organisation every file of the scenario is labelled with.
ORGANISATION = "Kestrel Post (invented demo scenario)"
#: The scenario's own (invented) request counter, one series per pod.
REQUEST_METRIC = "kestrel_http_requests_total"
#: The HPA of dispatch/tracking-api targets this average CPU utilisation (percent of request).
HPA_TARGET_UTILISATION = 90


@dataclass(frozen=True, slots=True)
class ContainerSpec:
    """One container: its true curve and today's hand-set CPU request/limit (millicores)."""

    name: str
    truth: Truth
    request_m: int
    limit_m: int | None = None
    memory: str = "256Mi"


@dataclass(frozen=True, slots=True)
class Spike:
    """A traffic spike once a week: from ``hour`` (UTC) of ``weekday`` (0 = Monday) for
    ``hours``, the rate is multiplied by ``factor`` (15-minute ramps at both ends)."""

    weekday: int
    hour: float
    hours: float
    factor: float

    def multiplier(self, t: np.ndarray) -> np.ndarray:
        week_s = (np.asarray(t, dtype=float) - _MONDAY) % (7 * 86400.0)
        since = week_s - (self.weekday * 86400.0 + self.hour * 3600.0)
        ramp = 900.0
        up = np.clip(since / ramp, 0.0, 1.0)
        down = np.clip((self.hours * 3600.0 - since) / ramp, 0.0, 1.0)
        return 1.0 + (self.factor - 1.0) * np.minimum(up, down)


#: 1970-01-05T00:00:00Z, a Monday: weekdays are counted from here (1970-01-01 was a Thursday)
_MONDAY = 4 * 86400.0


@dataclass(frozen=True, slots=True)
class RateProfile:
    """The workload's total request rate (req/s, summed over its pods).

    Daily: rate(h) = low + (peak − low) · ½(1 + cos(2π(h − peak_hour)/24)), h in UTC hours;
    weekly: on Saturdays and Sundays (UTC) times ``weekend``; optionally a weekly
    :class:`Spike`; then multiplicative noise N(1, noise). Pods share it evenly up to
    ``imbalance``.
    """

    low: float
    peak: float
    peak_hour: float = 14.0
    noise: float = 0.04
    imbalance: float = 0.08
    weekend: float = 1.0
    spike: Spike | None = None

    def total(self, t: np.ndarray) -> np.ndarray:
        t = np.asarray(t, dtype=float)
        hours = (t / 3600.0) % 24.0
        f = 0.5 * (1.0 + np.cos(2.0 * math.pi * (hours - self.peak_hour) / 24.0))
        rate = self.low + (self.peak - self.low) * f
        if self.weekend != 1.0:
            weekday = ((t - _MONDAY) // 86400.0) % 7
            rate = rate * np.where(weekday >= 5, self.weekend, 1.0)
        if self.spike is not None:
            rate = rate * self.spike.multiplier(t)
        return rate


@dataclass(frozen=True, slots=True)
class Service:
    """One invented Kestrel Post workload."""

    namespace: str
    workload: str
    kind: str  # "Deployment" | "StatefulSet"
    containers: tuple[ContainerSpec, ...]
    replicas: int
    rate_profile: RateProfile
    description: str = ""
    warmup_s: float = 300.0  # CPU is elevated for this long after a pod starts
    warmup_cores: float = 0.3  # extra cores at start, fading linearly to 0
    hpa_on_cpu: bool = False  # has a HorizontalPodAutoscaler scaling on CPU utilisation
    restart_at: float | None = 0.55  # fraction of the history at which pod 0 is replaced

    def keys(self) -> list[str]:
        """The model keys ``namespace/workload/container`` of this service."""
        return [f"{self.namespace}/{self.workload}/{c.name}" for c in self.containers]


_SCENARIO = (
    Service(
        namespace="parcels",
        workload="label-printer",
        kind="Deployment",
        description="renders shipping labels; CPU linear in the rate (Utilization Law)",
        replicas=3,
        rate_profile=RateProfile(low=120.0, peak=840.0, peak_hour=11.0, weekend=0.8,
                                 spike=Spike(weekday=1, hour=16.0, hours=2.0, factor=2.0)),
        containers=(
            ContainerSpec("app", Truth(Shape.LINEAR, base=0.05, slope=0.004), request_m=6000, limit_m=12000),
            ContainerSpec("log-shipper", Truth(Shape.LINEAR, base=0.01, slope=0.0002), request_m=200, limit_m=None,
                          memory="64Mi"),
        ),
        warmup_cores=0.25,
    ),
    Service(
        namespace="parcels",
        workload="route-planner",
        kind="Deployment",
        description="plans delivery routes; convex (lock contention), under-provisioned and throttled at peak",
        replicas=2,
        rate_profile=RateProfile(low=6.0, peak=60.0, peak_hour=7.0, weekend=0.8),
        containers=(
            ContainerSpec("planner", Truth(Shape.CONVEX, base=0.1, slope=0.01, curvature=0.0004),
                          request_m=500, limit_m=800, memory="512Mi"),
        ),
        warmup_cores=0.4,
    ),
    Service(
        namespace="dispatch",
        workload="tracking-api",
        kind="Deployment",
        description="parcel tracking lookups; concave (cache), scaled by an HPA on CPU utilisation",
        replicas=2,
        rate_profile=RateProfile(low=60.0, peak=600.0, peak_hour=18.0, weekend=0.9),
        containers=(
            ContainerSpec("api", Truth(Shape.CONCAVE, base=0.08, slope=0.0003, ceiling=0.9, scale=120.0),
                          request_m=1100, limit_m=None),
            ContainerSpec("cache-warmer", Truth(Shape.LINEAR, base=0.02, slope=0.0001), request_m=60, limit_m=120,
                          memory="128Mi"),
        ),
        hpa_on_cpu=True,
        warmup_cores=0.5,
    ),
    Service(
        namespace="dispatch",
        workload="address-lookup",
        kind="Deployment",
        description="address validation; a second index shard switches on above 80 req/s (step)",
        replicas=2,
        rate_profile=RateProfile(low=100.0, peak=660.0, peak_hour=10.0, weekend=0.7),
        containers=(
            ContainerSpec("lookup", Truth(Shape.STEP, base=0.05, slope=0.002, threshold=80.0, jump=0.35),
                          request_m=6000, limit_m=12000, memory="1Gi"),
        ),
        warmup_cores=0.2,
    ),
    Service(
        namespace="dispatch",
        workload="customs-gateway",
        kind="StatefulSet",
        description="customs declarations; flat until a batch window fills (knee), under-provisioned",
        replicas=3,
        rate_profile=RateProfile(low=14.0, peak=120.0, peak_hour=15.0, weekend=0.8),
        containers=(
            ContainerSpec("gateway", Truth(Shape.KNEE, base=0.2, slope=0.012, threshold=25.0),
                          request_m=250, limit_m=350, memory="384Mi"),
        ),
        restart_at=None,  # StatefulSet pods keep their names; no replacement in the history
        warmup_cores=0.15,
    ),
)

#: The whole invented scenario, in a fixed order.
SCENARIO: tuple[Service, ...] = _SCENARIO


def service(key_or_workload: str) -> Service:
    """The scenario service for ``namespace/workload[/container]`` or a bare workload name."""
    parts = key_or_workload.split("/")
    for s in SCENARIO:
        if (len(parts) == 1 and parts[0] == s.workload) or (len(parts) >= 2 and parts[:2] == [s.namespace, s.workload]):
            return s
    raise KeyError(f"no service {key_or_workload!r} in the invented Kestrel Post scenario")
