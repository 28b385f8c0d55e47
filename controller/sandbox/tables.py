"""Server-side printing: the `meta.k8s.io/v1` Table that `kubectl get` asks for.

kubectl sends `Accept: application/json;as=Table;v=v1;g=meta.k8s.io, …`; the sandbox
answers with the columns kubectl users expect for the kinds it serves (NAME, READY,
STATUS, AGE …) and a CRD's `additionalPrinterColumns` (simple `.a.b` JSON paths).
"""

from __future__ import annotations

import datetime as _dt
from typing import Any

from ratefit.controller.sandbox.resources import ResourceType


def _age(ts: str | None) -> str:
    if not ts:
        return "<unknown>"
    try:
        t = _dt.datetime.strptime(ts[:19], "%Y-%m-%dT%H:%M:%S").replace(tzinfo=_dt.timezone.utc)
    except ValueError:
        return "<unknown>"
    s = int((_dt.datetime.now(_dt.timezone.utc) - t).total_seconds())
    if s < 120:
        return f"{max(s, 0)}s"
    if s < 7200:
        return f"{s // 60}m"
    if s < 172800:
        return f"{s // 3600}h"
    return f"{s // 86400}d"


def _path(obj: Any, path: str) -> Any:
    for part in path.strip().lstrip(".").split("."):
        if not part:
            continue
        if isinstance(obj, dict):
            obj = obj.get(part)
        else:
            return None
    return obj


def _columns(rt: ResourceType, crd_columns: list[dict] | None) -> list[tuple[str, Any]]:
    st = lambda o: o.get("status") or {}  # noqa: E731
    sp = lambda o: o.get("spec") or {}  # noqa: E731
    if rt.kind == "Pod":
        def ready(o: dict) -> str:
            cs = st(o).get("containerStatuses") or []
            n = len(sp(o).get("containers") or [])
            return f"{sum(1 for c in cs if c.get('ready'))}/{n}"
        return [("Ready", ready), ("Status", lambda o: st(o).get("phase", "Pending")),
                ("Restarts", lambda o: sum(c.get("restartCount", 0)
                                           for c in st(o).get("containerStatuses") or []))]
    if rt.kind in ("Deployment", "StatefulSet", "ReplicaSet"):
        cols: list[tuple[str, Any]] = [
            ("Ready", lambda o: f"{st(o).get('readyReplicas', 0)}/{sp(o).get('replicas', 1)}")]
        if rt.kind == "Deployment":
            cols += [("Up-to-date", lambda o: st(o).get("updatedReplicas", 0)),
                     ("Available", lambda o: st(o).get("availableReplicas", 0))]
        return cols
    if rt.kind == "HorizontalPodAutoscaler":
        return [("Reference", lambda o: f"{(sp(o).get('scaleTargetRef') or {}).get('kind')}/"
                 f"{(sp(o).get('scaleTargetRef') or {}).get('name')}"),
                ("MinPods", lambda o: sp(o).get("minReplicas", 1)),
                ("MaxPods", lambda o: sp(o).get("maxReplicas")),
                ("Replicas", lambda o: st(o).get("currentReplicas", 0))]
    if rt.kind == "Namespace":
        return [("Status", lambda o: st(o).get("phase", "Active"))]
    if rt.kind == "Lease":
        return [("Holder", lambda o: sp(o).get("holderIdentity", ""))]
    cols = []
    for c in crd_columns or []:
        cols.append((c.get("name", ""), lambda o, p=c.get("jsonPath", ""): _path(o, p)))
    return cols


def to_table(rt: ResourceType, items: list[dict], list_meta: dict) -> dict:
    cols = _columns(rt, list(rt.printer_columns))
    defs = [{"name": "Name", "type": "string", "format": "name",
             "description": "Name must be unique within a namespace.", "priority": 0}]
    defs += [{"name": n, "type": "string", "format": "", "description": n, "priority": 0}
             for n, _ in cols]
    defs.append({"name": "Age", "type": "string", "format": "",
                 "description": "CreationTimestamp", "priority": 0})
    rows = []
    for o in items:
        md = o.get("metadata") or {}
        cells = [md.get("name")] + [("" if f(o) is None else f(o)) for _, f in cols]
        cells.append(_age(md.get("creationTimestamp")))
        rows.append({"cells": cells, "object": o})
    return {"kind": "Table", "apiVersion": "meta.k8s.io/v1", "metadata": list_meta,
            "columnDefinitions": defs, "rows": rows}
