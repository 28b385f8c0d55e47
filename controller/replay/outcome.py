"""What the replay comes to, per container, per workload and in total, for three request
strategies, and how it is printed (table, Markdown, JSON).

Strategies (the names are part of the JSON contract):

* ``current`` — the workload's requests as they are today, unchanged over the window;
* ``fixed`` — per container one constant request: the 0.95 quantile (numpy 'linear') of
  the container's per-pod, per-minute usage over the window (a careful hand-set value, in
  hindsight);
* ``ratefit`` — the requests the simulated passes set, each from the moment it took effect.

Figures:

* ``cpu_hours`` — requested cores × hours summed over pod-minutes (``usage``: cores used);
* ``under_share`` — share of a container's pod-minutes whose usage exceeded its request;
* ``peak_nodes`` — the most nodes of ``node_cpu`` needed at any pass to hold every pod's
  CPU requests (first-fit decreasing, :mod:`controller.replay.packing`).

A request in effect at a minute's start holds the whole minute (t − 60 s, t].
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ratefit.controller.replay.packing import NodeCounter
from ratefit.controller.replay.series import MINUTE, PodUsage

__all__ = ["STRATEGIES", "ContainerFigures", "Outcome", "container_figures", "node_counts", "render", "to_json"]

STRATEGIES = ("current", "fixed", "ratefit")
FIXED_QUANTILE = 0.95
#: usage counts as over the request only beyond this many cores (usage is stored as
#: float32: 0.6 reads back as 0.60000002; a micro-core is far below Kubernetes' 1m)
EPS = 1e-6


@dataclass(frozen=True)
class ContainerFigures:
    workload: str
    container: str
    pod_minutes: int
    cpu_hours: Mapping[str, float]  # usage + the three strategies
    under_minutes: Mapping[str, int]
    current_m: int | None
    fixed_m: float  # millicores (the quantile, unrounded)

    @property
    def under_share(self) -> dict[str, float]:
        n = self.pod_minutes
        return {s: (self.under_minutes[s] / n if n else 0.0) for s in STRATEGIES}


def step_values(steps: Sequence[tuple[float, int | None]], times: np.ndarray) -> np.ndarray:
    """The request (millicores; 0 for unset) in effect at each of ``times``: the last step
    with effective time ≤ t (the first step holds before it too)."""
    eff = np.array([s[0] for s in steps], dtype=float)
    val = np.array([0 if s[1] is None else s[1] for s in steps], dtype=np.int64)
    idx = np.searchsorted(eff, times, side="right") - 1
    return val[np.clip(idx, 0, len(val) - 1)]


def container_figures(workload: str, container: str, pods: Sequence[PodUsage], minutes: np.ndarray,
                      steps: Sequence[tuple[float, int | None]]) -> ContainerFigures:
    """The figures of one container over its pods' minutes (``minutes``: minute end times)."""
    current = steps[0][1]
    used = [u for u in pods if len(u.cores)]
    all_usage = np.concatenate([u.cores for u in used]).astype(float) if used else np.zeros(0)
    fixed_c = float(np.quantile(all_usage, FIXED_QUANTILE)) if all_usage.size else 0.0
    ratefit_m = step_values(steps, minutes - MINUTE)  # in effect at each minute's start
    hours = {s: 0.0 for s in ("usage", *STRATEGIES)}
    under = {s: 0 for s in STRATEGIES}
    cur_c = (current or 0) / 1000.0
    n = 0
    for u in used:
        x = u.cores.astype(float)
        n += x.size
        hours["usage"] += float(x.sum()) / 60.0
        hours["current"] += cur_c * x.size / 60.0
        hours["fixed"] += fixed_c * x.size / 60.0
        r = ratefit_m[u.first:u.stop] / 1000.0
        hours["ratefit"] += float(r.sum()) / 60.0
        under["current"] += int(np.count_nonzero(x > cur_c + EPS))
        under["fixed"] += int(np.count_nonzero(x > fixed_c + EPS))
        under["ratefit"] += int(np.count_nonzero(x > r + EPS))
    return ContainerFigures(workload=workload, container=container, pod_minutes=n, cpu_hours=hours,
                            under_minutes=under, current_m=current, fixed_m=fixed_c * 1000.0)


def node_counts(pod_requests: Mapping[str, np.ndarray], alive: np.ndarray, node_m: int) -> dict[str, np.ndarray]:
    """Nodes needed at each pass per strategy. ``pod_requests[s]``: (pods × passes)
    millicores each pod requests (all its containers); ``alive``: (pods × passes) bool."""
    out: dict[str, np.ndarray] = {}
    for s, req in pod_requests.items():
        counter = NodeCounter(node_m)
        counts = np.zeros(alive.shape[1], dtype=np.int64)
        for i in range(alive.shape[1]):
            counts[i] = counter.count(req[alive[:, i], i]).nodes
        out[s] = counts
    return out


@dataclass
class Outcome:
    start: float
    end: float
    step_s: float
    node_cpu: float
    containers: list[ContainerFigures]
    changes: dict[str, dict[str, int]]  # workload → {"changes", "rollouts", "resizes"}
    nodes: dict[str, np.ndarray]  # strategy → nodes needed at each pass
    notes: list[str] = field(default_factory=list)
    #: workloads under a CPU-utilisation autoscaler: simulated replicas and reserved CPU
    #: (``controller.replay.replicas``)
    autoscaled: list[Any] = field(default_factory=list)

    def workloads(self) -> list[str]:
        seen: dict[str, None] = {}
        for c in self.containers:
            seen.setdefault(c.workload, None)
        for w in self.changes:
            seen.setdefault(w, None)
        return list(seen)


def _sum(figs: Sequence[ContainerFigures]) -> tuple[dict[str, float], dict[str, float], int]:
    hours = {s: sum(f.cpu_hours[s] for f in figs) for s in ("usage", *STRATEGIES)}
    n = sum(f.pod_minutes for f in figs)
    under = {s: (sum(f.under_minutes[s] for f in figs) / n if n else 0.0) for s in STRATEGIES}
    return hours, under, n


def _r(x: float, nd: int = 3) -> float:
    return round(float(x), nd)


def _iso(t: float) -> str:
    import time

    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(t))


def to_json(o: Outcome) -> dict[str, Any]:
    """The JSON contract of ``ratefit replay --output json`` (issue 12), plus extra fields."""
    hours, under, n = _sum(o.containers)
    zero = {"changes": 0, "rollouts": 0, "resizes": 0}
    tot = {k: sum(c.get(k, 0) for c in o.changes.values()) for k in zero}
    workloads = []
    for w in o.workloads():
        figs = [c for c in o.containers if c.workload == w]
        wh, wu, wn = _sum(figs)
        ch = o.changes.get(w, zero)
        scaled = next((a for a in o.autoscaled if a.workload == w), None)
        extra = {} if scaled is None else _autoscaled_json(scaled)
        workloads.append({
            "workload": w,
            "cpu_hours": {k: _r(v) for k, v in wh.items()},
            "under_share": {k: _r(v, 6) for k, v in wu.items()},
            "changes": ch["changes"], "rollouts": ch["rollouts"], "resizes": ch["resizes"],
            "pod_minutes": wn,
            "containers": [{
                "container": c.container,
                "cpu_hours": {k: _r(v) for k, v in c.cpu_hours.items()},
                "under_share": {k: _r(v, 6) for k, v in c.under_share.items()},
                "current_m": c.current_m,
                "fixed_m": _r(c.fixed_m, 1),
                "pod_minutes": c.pod_minutes,
            } for c in figs],
            **extra,
        })
    return {
        "from": _iso(o.start),
        "to": _iso(o.end),
        "step_seconds": int(o.step_s) if float(o.step_s).is_integer() else o.step_s,
        "totals": {
            "cpu_hours": {k: _r(v) for k, v in hours.items()},
            "under_share": {k: _r(v, 6) for k, v in under.items()},
            "changes": tot["changes"], "rollouts": tot["rollouts"], "resizes": tot["resizes"],
            "peak_nodes": {s: int(o.nodes[s].max()) if len(o.nodes[s]) else 0 for s in STRATEGIES},
            "end_nodes": {s: int(o.nodes[s][-1]) if len(o.nodes[s]) else 0 for s in STRATEGIES},
            "pod_minutes": n,
        },
        "workloads": workloads,
        "node_cpu": o.node_cpu,
        "notes": list(o.notes),
    }


def _autoscaled_json(a: Any) -> dict[str, Any]:
    """The extra fields of an autoscaled workload: replicas and reserved CPU per strategy."""
    strategies = [s for s in (*STRATEGIES, "suggested") if s in a.replicas]

    def stats(x: np.ndarray) -> dict[str, float]:
        return {"min": int(x.min()), "mean": _r(x.mean(), 2), "max": int(x.max())} if len(x) else {}

    return {
        "autoscaler": {"hpa": a.hpa, "target_utilization": a.utilization, "min_replicas": a.min_replicas,
                       "max_replicas": a.max_replicas, "containers": list(a.containers)},
        "replicas": {s: stats(a.replicas[s]) for s in strategies},
        "reserved_cpu_hours": {s: _r(a.reserved_cpu_hours(s)) for s in strategies},
        "pod_request_m": {s: stats(a.request_m[s]) for s in strategies},
    }


def _autoscaled_lines(doc: Mapping[str, Any]) -> list[str]:
    out = []
    for w in doc["workloads"]:
        if "reserved_cpu_hours" not in w:
            continue
        a, h, n, r = w["autoscaler"], w["reserved_cpu_hours"], w["replicas"], w["pod_request_m"]
        parts = [f"{s} {h[s]:.1f} CPU-h ({r[s]['mean']:.0f}m a pod, {n[s]['mean']:.2f} replicas on average, "
                 f"{n[s]['min']}-{n[s]['max']})" for s in h]
        out.append(f"{w['workload']} under autoscaler {a['hpa']} (CPU {a['target_utilization']:g} %, "
                   f"{a['min_replicas']}-{a['max_replicas']} replicas), reserved replicas x request: " + "; ".join(parts))
    return out


def render(o: Outcome, fmt: str) -> str:
    """``table`` (plain text), ``markdown`` or ``json``."""
    doc = to_json(o)
    if fmt == "json":
        return json.dumps(doc, indent=2) + "\n"
    head = ["workload", "usage h", "current h", "fixed h", "ratefit h", "under cur", "under fix", "under rf",
            "changes", "rollouts", "resizes"]

    def row(name: str, d: Mapping[str, Any]) -> list[str]:
        h, u = d["cpu_hours"], d["under_share"]
        return [name, f"{h['usage']:.1f}", f"{h['current']:.1f}", f"{h['fixed']:.1f}", f"{h['ratefit']:.1f}",
                f"{u['current']:.2%}", f"{u['fixed']:.2%}", f"{u['ratefit']:.2%}",
                str(d["changes"]), str(d["rollouts"]), str(d["resizes"])]

    rows = [row(w["workload"], w) for w in doc["workloads"]] + [row("TOTAL", doc["totals"])]
    pk = doc["totals"]["peak_nodes"]
    en = doc["totals"]["end_nodes"]
    foot = (f"nodes of {o.node_cpu:g} CPU at the peak: current {pk['current']}, fixed {pk['fixed']}, ratefit {pk['ratefit']}; "
            f"at the end: {en['current']}, {en['fixed']}, {en['ratefit']}; "
            f"{doc['from']} to {doc['to']}, a pass every {doc['step_seconds']}s")
    scaled = _autoscaled_lines(doc)
    if fmt == "markdown":
        lines = ["| " + " | ".join(head) + " |", "|" + "---|" * len(head)]
        lines += ["| " + " | ".join(r) + " |" for r in rows]
        return ("\n".join(lines) + f"\n\n{foot}\n" + "".join(f"\n{x}\n" for x in scaled)
                + "".join(f"\n- {n}" for n in doc["notes"]) + "\n")
    widths = [max(len(head[i]), *(len(r[i]) for r in rows)) for i in range(len(head))]
    fmt_row = lambda r: "  ".join(c.ljust(widths[0]) if i == 0 else c.rjust(widths[i]) for i, c in enumerate(r))  # noqa: E731
    return "\n".join([fmt_row(head), *map(fmt_row, rows), foot, *scaled, *(f"note: {n}" for n in doc["notes"])]) + "\n"
