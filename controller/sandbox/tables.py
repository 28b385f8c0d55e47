"""Server-side printing: the `meta.k8s.io/v1` Table that `kubectl get` asks for.

kubectl sends `Accept: application/json;as=Table;v=v1;g=meta.k8s.io, …`; the sandbox
answers with the columns kubectl users expect for the kinds it serves (NAME, READY,
STATUS, AGE …) and a CRD's `additionalPrinterColumns` (simple `.a.b` JSON paths).
"""

from __future__ import annotations

import datetime as _dt
import re
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


_TOKEN = re.compile(r'\.([A-Za-z0-9_-]+)|\[(\d+|\*)\]|\[\?\(@\.([A-Za-z0-9_.-]+)\s*==\s*'
                    r'["\']([^"\']*)["\']\)\]')


def json_path(obj: Any, path: str) -> Any:
    """The JSONPath subset printer columns use: `.a.b`, `[0]`, `[*]`, `[?(@.k=="v")]`."""
    path = path.strip()
    if path.startswith("{") and path.endswith("}"):
        path = path[1:-1]
    nodes = [obj]
    pos = 0
    while pos < len(path):
        m = _TOKEN.match(path, pos)
        if not m:
            return None
        pos = m.end()
        field, index, fkey, fval = m.groups()
        out = []
        for n in nodes:
            if field is not None and isinstance(n, dict) and field in n:
                out.append(n[field])
            elif index is not None and isinstance(n, list):
                if index == "*":
                    out += n
                elif int(index) < len(n):
                    out.append(n[int(index)])
            elif fkey is not None and isinstance(n, list):
                for item in n:
                    v = item
                    for k in fkey.split("."):
                        v = v.get(k) if isinstance(v, dict) else None
                    if v is not None and str(v) == fval:
                        out.append(item)
        nodes = out
    if not nodes:
        return None
    return nodes[0] if len(nodes) == 1 else ",".join(str(n) for n in nodes)


def _columns(rt: ResourceType) -> list[tuple[Any, ...]]:
    """(name, getter[, priority]) per column; priority 1 shows with `-o wide` only."""
    st = lambda o: o.get("status") or {}  # noqa: E731
    sp = lambda o: o.get("spec") or {}  # noqa: E731
    if rt.kind == "Pod":
        def ready(o: dict) -> str:
            cs = st(o).get("containerStatuses") or []
            n = len(sp(o).get("containers") or [])
            return f"{sum(1 for c in cs if c.get('ready'))}/{n}"
        return [("Ready", ready), ("Status", lambda o: st(o).get("phase", "Pending")),
                ("Restarts", lambda o: sum(c.get("restartCount", 0)
                                           for c in st(o).get("containerStatuses") or [])),
                ("IP", lambda o: st(o).get("podIP", "<none>"), 1),
                ("Node", lambda o: sp(o).get("nodeName", "<none>"), 1)]
    if rt.kind in ("Deployment", "StatefulSet", "ReplicaSet"):
        cols: list[tuple[Any, ...]] = [
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
    if rt.kind == "Node":
        return [("Status", lambda o: "Ready" if any(
                    c.get("type") == "Ready" and c.get("status") == "True"
                    for c in st(o).get("conditions") or []) else "NotReady"),
                ("Roles", lambda o: "<none>"),
                ("Version", lambda o: (st(o).get("nodeInfo") or {}).get("kubeletVersion", ""))]
    if rt.kind == "Namespace":
        return [("Status", lambda o: st(o).get("phase", "Active"))]
    if rt.kind == "Lease":
        return [("Holder", lambda o: sp(o).get("holderIdentity", ""))]
    return []


def _crd_columns(rt: ResourceType) -> list[tuple[dict, Any]]:
    """A CRD's additionalPrinterColumns (default: Age), dates shown as ages like the
    apiextensions table convertor does."""
    specs = list(rt.printer_columns) or [{"name": "Age", "type": "date",
                                          "jsonPath": ".metadata.creationTimestamp"}]
    out = []
    for c in specs:
        ctype = c.get("type", "string")
        getter = (lambda o, p=c.get("jsonPath", ""): _age(json_path(o, p))
                  if json_path(o, p) else "<unknown>") if ctype == "date" else \
            (lambda o, p=c.get("jsonPath", ""): json_path(o, p))
        out.append(({"name": c.get("name", ""), "type": "string" if ctype == "date" else ctype,
                     "format": c.get("format", ""), "description": c.get("description", ""),
                     "priority": c.get("priority", 0)}, getter))
    return out


def _event_columns() -> list[tuple[dict, Any]]:
    def col(name: str, f: Any, priority: int = 0) -> tuple[dict, Any]:
        return ({"name": name, "type": "string", "format": "", "description": name,
                 "priority": priority}, f)

    def obj(o: dict) -> str:
        ref = o.get("involvedObject") or o.get("regarding") or {}
        return f"{str(ref.get('kind', '')).lower()}/{ref.get('name', '')}"

    def last(o: dict) -> str:
        return _age(o.get("lastTimestamp") or o.get("deprecatedLastTimestamp")
                    or o.get("eventTime") or (o.get("metadata") or {}).get("creationTimestamp"))

    return [col("Last Seen", last), col("Type", lambda o: o.get("type", "")),
            col("Reason", lambda o: o.get("reason", "")), col("Object", obj),
            col("Message", lambda o: o.get("message", o.get("note", "")))]


def to_table(rt: ResourceType, items: list[dict], list_meta: dict) -> dict:
    if rt.kind == "Event":
        cols = _event_columns()
        defs = [d for d, _ in cols] + [{"name": "Name", "type": "string", "format": "name",
                                        "description": "Name", "priority": 1}]
        rows = [{"cells": [f(o) for _, f in cols] + [(o.get("metadata") or {}).get("name")],
                 "object": o} for o in items]
        return {"kind": "Table", "apiVersion": "meta.k8s.io/v1", "metadata": list_meta,
                "columnDefinitions": defs, "rows": rows}
    if rt.custom:
        cols = _crd_columns(rt)
    else:
        cols = [({"name": c[0], "type": "string", "format": "", "description": c[0],
                  "priority": c[2] if len(c) > 2 else 0}, c[1]) for c in _columns(rt)]
        age = ({"name": "Age", "type": "string", "format": "",
                "description": "CreationTimestamp", "priority": 0},
               lambda o: _age((o.get("metadata") or {}).get("creationTimestamp")))
        cols = [c for c in cols if not c[0]["priority"]] + [age] + \
            [c for c in cols if c[0]["priority"]]
    defs = [{"name": "Name", "type": "string", "format": "name",
             "description": "Name must be unique within a namespace.", "priority": 0}]
    defs += [d for d, _ in cols]
    rows = []
    for o in items:
        md = o.get("metadata") or {}
        cells = [md.get("name")]
        for _, f in cols:
            v = f(o)
            cells.append("" if v is None else v)
        rows.append({"cells": cells, "object": o})
    return {"kind": "Table", "apiVersion": "meta.k8s.io/v1", "metadata": list_meta,
            "columnDefinitions": defs, "rows": rows}
