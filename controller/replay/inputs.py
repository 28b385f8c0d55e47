"""What a replay starts from besides the history: the policies with their workloads, and the
sizing answers.

* :func:`targets_from_objects` — SizingPolicies, Deployments/StatefulSets and
  HorizontalPodAutoscalers as plain dicts (from manifest files, :func:`read_manifests`, or
  read from a cluster, :func:`targets_from_cluster`, which only LISTs). A policy that does
  not parse, or whose workload is missing, is skipped with a note saying why — one bad
  object never holds the others.
* Sizers answer (demand, upper, extrapolated) in cores for one model at many rates, with
  the sizing API's rounding (whole millicores, up): :class:`StoreSizer` reads a model
  store directly; :class:`ApiSizer` asks a running sizing API in batches.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import yaml

from ratefit.controller.policy import KIND, PolicyInvalid, parse_policy
from ratefit.controller.quantity import parse_cpu
from ratefit.controller.replay.simulate import ReplayTarget
from ratefit.controller.stages.observe import conflicts
from ratefit.controller.workload import PolicyObject
from ratefit.models.errors import InputError, RatefitError

__all__ = ["Targets", "read_manifests", "targets_from_objects", "targets_from_cluster", "StoreSizer", "ApiSizer", "Sizer"]


@dataclass(frozen=True)
class Targets:
    targets: tuple[ReplayTarget, ...]
    #: workload key → kind ("Deployment" | "StatefulSet")
    kinds: Mapping[str, str]
    notes: tuple[str, ...] = ()


def read_manifests(paths: Sequence[str | Path]) -> list[dict[str, Any]]:
    """Every object in the YAML files named (folders: their ``*.yaml``/``*.yml``, sorted)."""
    objs: list[dict[str, Any]] = []
    for raw in paths:
        p = Path(raw)
        if p.is_dir():
            files = sorted([*p.rglob("*.yaml"), *p.rglob("*.yml")])
        elif p.is_file():
            files = [p]
        else:
            raise InputError(f"-f {p}: no such file or folder")
        for f in files:
            try:
                docs = list(yaml.safe_load_all(f.read_text(encoding="utf-8")))
            except (OSError, yaml.YAMLError) as exc:
                raise InputError(f"-f {f}: not readable YAML ({exc})") from exc
            for d in docs:
                if isinstance(d, Mapping) and d.get("kind") == "List":
                    objs.extend(x for x in d.get("items") or [] if isinstance(x, Mapping))
                elif isinstance(d, Mapping):
                    objs.append(dict(d))
    return objs


def _cpu(res: Mapping[str, Any] | None, key: str, where: str) -> int | None:
    value = ((res or {}).get(key) or {}).get("cpu")
    return None if value is None else parse_cpu(value, field=where)


def _hpa_on_cpu(spec: Mapping[str, Any]) -> bool:
    # autoscaling/v2 API reference: no metrics means the default 80 % CPU utilisation
    metrics = spec.get("metrics")
    if not metrics:
        return True
    for m in metrics:
        src = m.get("resource") if m.get("type") == "Resource" else m.get("containerResource") \
            if m.get("type") == "ContainerResource" else None
        if src and src.get("name") == "cpu" and (src.get("target") or {}).get("type") == "Utilization":
            return True
    return False


def targets_from_objects(objs: Iterable[Mapping[str, Any]], scalers: Sequence[Any] = ()) -> Targets:
    """``scalers``: HorizontalPodAutoscalers already read (``workload.HorizontalScaler``),
    besides those among ``objs``."""
    from ratefit.controller.hpa_sizing import autoscaler_view
    from ratefit.controller.kube import hpa_from_json as scaler_from_object

    workloads: dict[tuple[str, str, str], dict[str, tuple[int | None, int | None]]] = {}
    replicas: dict[tuple[str, str, str], int] = {}
    hpa: set[tuple[str, str, str]] = set()
    hpas: dict[tuple[str, str, str], list[Any]] = {}
    for s in scalers:
        hpas.setdefault((s.namespace, s.target_kind, s.target_name), []).append(s)
        if s.scales_on_cpu_utilization:
            hpa.add((s.namespace, s.target_kind, s.target_name))
    policies: list[Mapping[str, Any]] = []
    notes: list[str] = []
    for o in objs:
        kind = o.get("kind")
        meta = o.get("metadata") or {}
        ns = meta.get("namespace") or "default"
        if kind in ("Deployment", "StatefulSet"):
            key = (ns, kind, meta.get("name") or "")
            try:
                containers = {}
                for c in (((o.get("spec") or {}).get("template") or {}).get("spec") or {}).get("containers") or []:
                    res = c.get("resources") or {}
                    where = f"{ns}/{kind}/{key[2]} container {c.get('name')}"
                    containers[c["name"]] = (_cpu(res, "requests", where + " requests.cpu"),
                                             _cpu(res, "limits", where + " limits.cpu"))
            except (InputError, KeyError, TypeError, AttributeError) as exc:
                notes.append(f"{ns}/{kind}/{key[2]} skipped: {exc}")
                continue
            workloads[key] = containers
            n = (o.get("spec") or {}).get("replicas")
            replicas[key] = n if isinstance(n, int) and not isinstance(n, bool) and n >= 0 else 1
        elif kind == "HorizontalPodAutoscaler":
            spec = o.get("spec") or {}
            ref = spec.get("scaleTargetRef") or {}
            wk = (ns, ref.get("kind") or "", ref.get("name") or "")
            if _hpa_on_cpu(spec):
                hpa.add(wk)
            try:
                hpas.setdefault(wk, []).append(scaler_from_object({**o, "metadata": {**meta, "namespace": ns}}))
            except (TypeError, AttributeError, ValueError) as exc:
                notes.append(f"HorizontalPodAutoscaler {ns}/{meta.get('name')} not read: {exc}")
        elif kind == KIND:
            policies.append(o)
    targets: list[ReplayTarget] = []
    kinds: dict[str, str] = {}
    valid: list[tuple[PolicyObject, Any]] = []
    for o in policies:
        meta = o.get("metadata") or {}
        try:
            p = parse_policy(o)
        except PolicyInvalid as exc:
            notes.append(f"SizingPolicy {meta.get('namespace')}/{meta.get('name')} skipped: {exc}")
            continue
        wk = (p.namespace, p.workload_kind, p.workload_name)
        if wk not in workloads:
            notes.append(f"SizingPolicy {p.key} skipped: its workload {p.workload_key} is not among the objects read")
            continue
        valid.append((PolicyObject(namespace=p.namespace, name=p.name, uid="", generation=p.generation or 0,
                                   resource_version="", spec={}, status={},
                                   created=str(meta.get("creationTimestamp") or "")), p))
    # two policies naming one workload: the older acts, the newer is held PolicyConflict and
    # draws nothing from the budget — the live loop's rule (observe stage), not a copy of it
    clashes = conflicts(valid)
    for po, p in valid:
        wk = (p.namespace, p.workload_kind, p.workload_name)
        older = clashes.get((p.namespace, p.name))
        if older is not None:
            notes.append(f"SizingPolicy {p.key} is held PolicyConflict: {older} is older and names the same "
                         f"workload {p.workload_key}")
        kinds[p.workload_key] = p.workload_kind
        view = autoscaler_view(hpas.get(wk, []), metric_name=p.autoscaler_rate_metric,
                               workload_replicas=replicas.get(wk, 1))
        targets.append(ReplayTarget(policy=p, containers=workloads[wk], hpa_on_cpu=wk in hpa, conflict_with=older,
                                    autoscaler=view))
    if not targets:
        raise InputError("no SizingPolicy with its workload to replay"
                         + (f" ({'; '.join(notes[:3])})" if notes else "; give the policies and workloads with -f or --kubeconfig"))
    return Targets(targets=tuple(targets), kinds=kinds, notes=tuple(notes))


def targets_from_cluster(kube: Any, namespaces: Sequence[str] = ()) -> Targets:
    """LIST the policies, workloads and autoscalers through the Kubernetes adapter (read only)."""
    from ratefit.controller.policy import GROUP, VERSION

    objs: list[dict[str, Any]] = []
    scalers: list[Any] = []
    pols = list(kube.list_policies(list(namespaces) or None).items)
    objs.extend({"apiVersion": f"{GROUP}/{VERSION}", "kind": KIND,
                 "metadata": {"namespace": p.namespace, "name": p.name, "generation": p.generation,
                              "creationTimestamp": getattr(p, "created", "") or None},
                 "spec": dict(p.spec or {})} for p in pols)
    for ns in sorted({p.namespace for p in pols}):
        for kind in ("Deployment", "StatefulSet"):
            for w in kube.list_workloads(kind, namespace=ns):
                objs.append({"kind": w.kind.value, "metadata": {"namespace": w.namespace, "name": w.name},
                             "spec": {"replicas": getattr(w, "replicas", None) or 1,
                                      "template": {"spec": {"containers": [
                                 {"name": c.name, "resources": {
                                     "requests": {} if c.cpu_request_m is None else {"cpu": f"{c.cpu_request_m}m"},
                                     "limits": {} if c.cpu_limit_m is None else {"cpu": f"{c.cpu_limit_m}m"}}}
                                 for c in w.containers]}}}})
        scalers.extend(kube.list_hpas(ns))
    return targets_from_objects(objs, scalers)


def _api_rounding(cores: np.ndarray) -> np.ndarray:
    """Whole millicores rounded up, back in cores — what the sizing API answers
    (``models.curve.to_millicores``) and what the live loop then reads."""
    return np.ceil(np.round(cores * 1000.0, 6)) / 1000.0


class Sizer:
    """Answers for one model at many rates: (demand, upper, extrapolated), NaN where no answer."""

    def answers(self, model: str, rates: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        raise NotImplementedError


def _empty(n: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    return np.full(n, np.nan), np.full(n, np.nan), np.zeros(n, dtype=bool)


class StoreSizer(Sizer):
    """Reads the model store directly (the same artifacts and lookup the sizing API serves)."""

    def __init__(self, root: str | Path) -> None:
        from ratefit.models.store import ModelStore

        if not Path(root).is_dir():
            raise InputError(f"--store {root}: no such folder")
        self.store = ModelStore(root)
        self._curves: dict[str, Any] = {}
        self._capacity: dict[str, float | None] = {}
        self.missing: set[str] = set()

    def _curve(self, model: str) -> Any:
        if model not in self._curves:
            try:
                art = self.store.load(model)
                self._curves[model] = art.demand_curve()
                self._capacity[model] = art.capacity
            except RatefitError:
                self._curves[model] = None
                self.missing.add(model)
        return self._curves[model]

    def facts(self, model: str) -> Any:
        """The model's trained range, per-pod capacity and curve points
        (``hpa_sizing.facts_from_curve``), as the observe stage gathers them under an
        autoscaler; None without a model."""
        from ratefit.controller.hpa_sizing import facts_from_curve

        curve = self._curve(model)
        return None if curve is None else facts_from_curve(curve, capacity=self._capacity.get(model))

    def answers(self, model: str, rates: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        demand, upper, extrap = _empty(len(rates))
        curve = self._curve(model)
        ok = np.isfinite(rates) & (rates >= 0)
        if curve is None or not ok.any():
            return demand, upper, extrap
        look = curve.lookup(rates[ok])
        demand[ok] = _api_rounding(look.demand)
        upper[ok] = _api_rounding(look.upper)
        extrap[ok] = look.extrapolated
        return demand, upper, extrap


class ApiSizer(Sizer):
    """Asks a sizing API (``ratefit serve``) through the controller's client, in batches."""

    def __init__(self, client: Any, *, batch: int = 20_000) -> None:
        self.client = client
        self.batch = batch
        self.missing: set[str] = set()

    def answers(self, model: str, rates: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        demand, upper, extrap = _empty(len(rates))
        idx = np.flatnonzero(np.isfinite(rates) & (rates >= 0))
        for i in range(0, len(idx), self.batch):
            part = idx[i:i + self.batch]
            got = self.client.demand_batch([(model, float(rates[j])) for j in part])
            for j, a in zip(part, got):
                cpu_m, upper_m = getattr(a, "cpu_m", None), getattr(a, "upper_m", None)
                if cpu_m is None or upper_m is None:
                    self.missing.add(model)
                    continue
                demand[j] = cpu_m / 1000.0
                upper[j] = upper_m / 1000.0
                extrap[j] = bool(getattr(a, "extrapolated", False))
        return demand, upper, extrap
