"""The typed interfaces the stages need (structural Protocols; nothing imports an adapter).

- :class:`KubeReader` — what the observe stage reads each pass. ``KubeAdapter``
  (``controller/kube.py``) satisfies it with one LIST per call; a watch-fed cache
  with the same method names and return types satisfies it from memory.
- :class:`KubeWriter` — what the act and record stages change: patch, resize,
  annotate, status, Events.
- :class:`Kube` — both; the act stage re-reads a workload after a 409 through the
  writer's adapter (a fresh GET: after a conflict a cached copy is stale by definition).
- :class:`RateSource` — per-pod rates (``controller/metrics_source``).
- :class:`SizingSource` — the sizing API's batch answers (``controller/sizing_client``).
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Mapping, Sequence
from typing import Protocol

from ratefit.controller.metrics_source import RateRequest, RateResult
from ratefit.controller.workload import (
    CpuChange,
    EventType,
    HorizontalScaler,
    ObjectRef,
    Pod,
    PolicyList,
    ResizeOutcome,
    Workload,
    WorkloadKind,
)

__all__ = ["Kube", "KubeReader", "KubeWriter", "RateSource", "SizingSource"]


class KubeReader(Protocol):
    """Kubernetes reads of one pass (LIST-backed or cache-backed)."""

    def list_policies(self, namespaces: Sequence[str] | None = None) -> PolicyList: ...

    def list_workloads(self, kind: WorkloadKind | str, *, namespace: str | None = None) -> Sequence[Workload]: ...

    def read_workload(self, namespace: str, kind: WorkloadKind | str, name: str) -> Workload: ...

    def list_hpas(self, namespace: str | None = None) -> Sequence[HorizontalScaler]: ...

    def list_pods(self, workload: Workload) -> Sequence[Pod]: ...


class KubeWriter(Protocol):
    """Kubernetes writes of one pass."""

    def patch_cpu(
        self, workload: Workload, changes: Mapping[str, CpuChange], *,
        annotations: Mapping[str, str | None] | None = None, after_dry_run: Callable[[], None] | None = None,
    ) -> Workload: ...

    def resize_pods(self, pods: Iterable[Pod], changes: Mapping[str, CpuChange]) -> Sequence[ResizeOutcome]: ...

    def annotate_workload(self, workload: Workload, annotations: Mapping[str, str | None]) -> Workload: ...

    def write_policy_status(
        self, namespace: str, name: str, status: Mapping[str, object], *, resource_version: str | None = None,
    ) -> object: ...

    def emit_event(
        self, *, regarding: ObjectRef, reason: str, note: str, action: str, type: EventType = ...,
        related: ObjectRef | None = None,
    ) -> str: ...


class Kube(KubeReader, KubeWriter, Protocol):
    """The whole adapter (``controller/kube.KubeAdapter``)."""


class RateSource(Protocol):
    def per_pod_rates(self, requests: Sequence[RateRequest]) -> Mapping[str, RateResult]: ...


class SizingSource(Protocol):
    """``demand_batch`` answers one item per (model key, rate), in order: an object or
    mapping with ``cpu_m``/``upper_m``/``extrapolated`` (or ``error``). Optionally
    ``model_detail(key)`` answers the model's detail (``rate_range``, ``capacity``) —
    ``SizingClient`` has it; without it the autoscaler's coupled answer is left out."""

    def demand_batch(self, items: Sequence[tuple[str, float]]) -> Sequence[object]: ...
