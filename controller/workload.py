"""Plain, frozen views of the Kubernetes objects the controller reads and the changes it
asks for. The Kubernetes adapter (``controller/kube.py``) builds and consumes these; the
reconcile loop and the pure decision code only ever see these types, never the client's
models or raw JSON. No I/O and no ``kubernetes`` import here."""

from __future__ import annotations

import enum
import json
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from ratefit.controller import crd
from ratefit.controller.quantity import format_cpu, parse_cpu
from ratefit.models.errors import InputError

__all__ = [
    "PREVIOUS_REQUESTS_ANNOTATION",
    "WorkloadKind",
    "ObjectRef",
    "ContainerResources",
    "Workload",
    "PodContainer",
    "Pod",
    "HorizontalScaler",
    "ScalerMetric",
    "CpuChange",
    "PreviousRequest",
    "PolicyObject",
    "PolicyList",
    "PolicyEvent",
    "ResizeOutcome",
    "EventType",
    "decode_previous_requests",
    "encode_previous_requests",
]

#: Annotation on the workload holding what ``ratefit revert`` restores (DESIGN.md naming sheet).
PREVIOUS_REQUESTS_ANNOTATION = "ratefit.dev/previous-requests"
#: Annotation written with a change: when ratefit last changed the workload (the cooldown
#: survives a crash before the status write).
LAST_CHANGE_ANNOTATION = "ratefit.dev/last-change"


class WorkloadKind(str, enum.Enum):
    DEPLOYMENT = "Deployment"
    STATEFULSET = "StatefulSet"

    @classmethod
    def parse(cls, text: str) -> WorkloadKind:
        low = text.strip().lower()
        for kind in cls:
            if low in (kind.value.lower(), kind.value.lower() + "s", _SHORT[kind]):
                return kind
        raise InputError(f"workload kind {text!r} is not supported; use Deployment or StatefulSet")


_SHORT = {WorkloadKind.DEPLOYMENT: "deploy", WorkloadKind.STATEFULSET: "sts"}


class EventType(str, enum.Enum):
    NORMAL = "Normal"
    WARNING = "Warning"


@dataclass(frozen=True, slots=True)
class ObjectRef:
    """What an Event is about (``regarding``): any namespaced object."""

    api_version: str
    kind: str
    namespace: str
    name: str
    uid: str | None = None


@dataclass(frozen=True, slots=True)
class ContainerResources:
    """One container of a pod template. CPU in millicores (None: not set); memory kept
    as the quantity strings the server returned (we never change memory)."""

    name: str
    cpu_request_m: int | None
    cpu_limit_m: int | None
    mem_request: str | None = None
    mem_limit: str | None = None
    #: the container's image in the pod template (None: not read)
    image: str | None = None


@dataclass(frozen=True, slots=True)
class Workload:
    namespace: str
    kind: WorkloadKind
    name: str
    uid: str
    generation: int
    resource_version: str
    replicas: int
    #: the label selector, as ``key=value,…`` (matchLabels and matchExpressions rendered)
    selector: str
    annotations: Mapping[str, str]
    containers: tuple[ContainerResources, ...]
    #: a rollout is under way: updatedReplicas < replicas or observedGeneration < generation
    rollout_in_progress: bool

    @property
    def key(self) -> str:
        return f"{self.namespace}/{self.kind.value}/{self.name}"

    @property
    def ref(self) -> ObjectRef:
        return ObjectRef("apps/v1", self.kind.value, self.namespace, self.name, self.uid or None)

    def container(self, name: str) -> ContainerResources:
        for c in self.containers:
            if c.name == name:
                return c
        known = ", ".join(c.name for c in self.containers) or "none"
        raise InputError(f"{self.key} has no container {name!r} (containers: {known})")

    @property
    def previous_requests(self) -> dict[str, PreviousRequest]:
        """The annotated values to revert to ({} when none)."""
        return decode_previous_requests(self.annotations.get(PREVIOUS_REQUESTS_ANNOTATION), where=self.key)


@dataclass(frozen=True, slots=True)
class PodContainer:
    """A running container's CPU as the kubelet reports it (``status.containerStatuses[]
    .resources`` when present, i.e. after in-place resize support), else the pod spec."""

    name: str
    cpu_request_m: int | None
    cpu_limit_m: int | None
    #: what the pod spec asks for (may differ from the actual while a resize is pending)
    spec_cpu_request_m: int | None
    spec_cpu_limit_m: int | None


@dataclass(frozen=True, slots=True)
class Pod:
    namespace: str
    name: str
    uid: str
    resource_version: str
    phase: str
    containers: tuple[PodContainer, ...]
    #: PodResizePending / PodResizeInProgress condition reasons, when the kubelet set them
    resize_conditions: Mapping[str, str] = field(default_factory=dict)


@dataclass(frozen=True, slots=True)
class HorizontalScaler:
    """An autoscaling/v2 HorizontalPodAutoscaler that targets a workload."""

    namespace: str
    name: str
    #: spec.scaleTargetRef
    target_kind: str
    target_name: str
    #: it scales on a Resource metric ``cpu`` with target type Utilization: changing the
    #: CPU request moves what it measures → HorizontalConflict
    scales_on_cpu_utilization: bool
    #: spec.metrics, one entry each (an HPA without metrics: the API's default, 80 %
    #: average CPU utilisation, as one Resource entry); empty when not read
    metrics: tuple[ScalerMetric, ...] = ()
    min_replicas: int | None = None  # spec.minReplicas (the API's default is 1)
    max_replicas: int | None = None  # spec.maxReplicas
    current_replicas: int | None = None  # status.currentReplicas, when the HPA has run
    #: behavior.scaleUp.tolerance (Kubernetes 1.33+), else the default 0.1
    tolerance: float = 0.1
    #: behavior.scaleDown.stabilizationWindowSeconds, else the default 300
    scale_down_window_s: float = 300.0


@dataclass(frozen=True, slots=True)
class ScalerMetric:
    """One metric of an autoscaling/v2 HPA (``spec.metrics[]``), values as numbers.

    ``source`` is the metric type: Resource, ContainerResource, Pods, Object or External;
    ``name`` the metric's name (``pods.metric.name`` …) or the resource (``cpu``);
    ``target_type`` Utilization, AverageValue or Value with its number: ``average_value``
    (per pod), ``value`` (a total) or ``utilization`` (percent of the request)."""

    source: str
    name: str
    target_type: str
    average_value: float | None = None
    value: float | None = None
    utilization: float | None = None
    #: ContainerResource: the container measured
    container: str | None = None


@dataclass(frozen=True, slots=True)
class CpuChange:
    """What to set on one container. ``limit_m=None`` leaves the limit as it is;
    ``drop_limit=True`` removes it (policy ``limits: drop``)."""

    request_m: int
    limit_m: int | None = None
    drop_limit: bool = False

    def __post_init__(self) -> None:
        if self.request_m < 0 or (self.limit_m is not None and self.limit_m < 0):
            raise InputError(f"CPU values must be >= 0, got {self}")
        if self.drop_limit and self.limit_m is not None:
            raise InputError("CpuChange: set limit_m or drop_limit, not both")


@dataclass(frozen=True, slots=True)
class PreviousRequest:
    """One container's CPU before ratefit first changed it (None: was not set)."""

    cpu_request_m: int | None
    cpu_limit_m: int | None


def encode_previous_requests(values: Mapping[str, PreviousRequest]) -> str:
    """JSON for the annotation: ``{container: {"cpu_request": "250m", "cpu_limit": "500m"|null}}``,
    keys sorted so the same values always give the same text."""
    doc = {
        name: {
            "cpu_request": None if v.cpu_request_m is None else format_cpu(v.cpu_request_m),
            "cpu_limit": None if v.cpu_limit_m is None else format_cpu(v.cpu_limit_m),
        }
        for name, v in sorted(values.items())
    }
    return json.dumps(doc, sort_keys=True, separators=(",", ":"))


def decode_previous_requests(text: str | None, *, where: str = "workload") -> dict[str, PreviousRequest]:
    if not text:
        return {}
    what = f"{where}: annotation {PREVIOUS_REQUESTS_ANNOTATION}"
    try:
        doc = json.loads(text)
    except json.JSONDecodeError as exc:
        raise InputError(f"{what} is not JSON ({exc}); fix or delete the annotation") from exc
    if not isinstance(doc, dict):
        raise InputError(f"{what} must be a JSON object {{container: {{cpu_request, cpu_limit}}}}")
    out: dict[str, PreviousRequest] = {}
    for name, entry in doc.items():
        if not isinstance(entry, dict):
            raise InputError(f"{what}: entry {name!r} must be an object with cpu_request/cpu_limit")
        req, lim = entry.get("cpu_request"), entry.get("cpu_limit")
        out[name] = PreviousRequest(
            None if req is None else parse_cpu(req, field=f"{what} [{name}].cpu_request"),
            None if lim is None else parse_cpu(lim, field=f"{what} [{name}].cpu_limit"),
        )
    return out


@dataclass(frozen=True, slots=True)
class PolicyObject:
    """A SizingPolicy as stored: metadata the loop needs plus the raw spec/status
    (``controller/policy`` validates the spec with pydantic)."""

    namespace: str
    name: str
    uid: str
    generation: int
    resource_version: str
    spec: Mapping[str, Any]
    status: Mapping[str, Any]
    #: ``metadata.creationTimestamp`` (RFC 3339; "" when unknown) — the older of two
    #: policies naming one workload keeps acting
    created: str = ""

    @property
    def ref(self) -> ObjectRef:
        return ObjectRef(crd.API_VERSION, crd.KIND, self.namespace, self.name, self.uid or None)


@dataclass(frozen=True, slots=True)
class PolicyList:
    items: tuple[PolicyObject, ...]
    #: where a watch should start to see every change after this list
    resource_version: str


@dataclass(frozen=True, slots=True)
class PolicyEvent:
    """One watch event. ``type`` is ADDED, MODIFIED, DELETED, or RELISTED: the watch
    position expired (410), the adapter listed again and ``policy`` is None while
    ``listed`` holds the full fresh list — treat it as "everything may have changed"."""

    type: str
    policy: PolicyObject | None
    resource_version: str
    listed: PolicyList | None = None


@dataclass(frozen=True, slots=True)
class ResizeOutcome:
    """What happened to one pod's in-place resize. ``ok`` means the API server accepted
    the new spec; the kubelet applies it later (see ``Pod.resize_conditions``)."""

    pod: str
    ok: bool
    resource_version: str | None = None
    error: str | None = None
    #: the error class name (KubeInvalid, KubeConflict, KubeNotFound …) when not ok
    error_kind: str | None = None
