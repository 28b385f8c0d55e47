"""Label and field selectors as the list and watch verbs read them.

Label selector grammar (Kubernetes "Labels and Selectors" docs): comma-separated
requirements `k=v`, `k==v`, `k!=v`, `k in (a,b)`, `k notin (a,b)`, `k` (exists) and
`!k` (does not exist). Field selectors: `metadata.name`, `metadata.namespace` and, for
pods, `status.phase` and `spec.nodeName`, for events `involvedObject.*`/`regarding.*`
(name, namespace, uid, kind), `reason` and `type`, with `=`, `==` and `!=`.
"""

from __future__ import annotations

import re
from collections.abc import Callable
from typing import Any

from ratefit.controller.sandbox.errors import ApiError, bad_request

Matcher = Callable[[dict[str, str]], bool]

_SET_RE = re.compile(r"^\s*(!?)\s*([A-Za-z0-9_./-]+)\s*(?:(notin|in)\s*\(([^)]*)\))?\s*$")


def _split(text: str) -> list[str]:
    parts, depth, cur = [], 0, []
    for ch in text:
        if ch == "(":
            depth += 1
        elif ch == ")":
            depth -= 1
        if ch == "," and depth == 0:
            parts.append("".join(cur))
            cur = []
        else:
            cur.append(ch)
    parts.append("".join(cur))
    return [p for p in (x.strip() for x in parts) if p]


def parse_label_selector(text: str | None) -> Matcher:
    if not text:
        return lambda labels: True
    checks: list[Matcher] = []
    for req in _split(text):
        m = re.match(r"^([A-Za-z0-9_./-]+)\s*(==|!=|=)\s*([A-Za-z0-9_.-]*)$", req)
        if m:
            key, op, value = m.groups()
            if op == "!=":
                checks.append(lambda lb, k=key, v=value: lb.get(k) != v)
            else:
                checks.append(lambda lb, k=key, v=value: lb.get(k) == v)
            continue
        m = _SET_RE.match(req)
        if not m:
            raise bad_request(f"unable to parse requirement: {req!r}")
        neg, key, op, values = m.groups()
        if op:
            if neg:
                raise bad_request(f"unable to parse requirement: {req!r}")
            vals = {v.strip() for v in values.split(",") if v.strip()}
            if op == "in":
                checks.append(lambda lb, k=key, vs=vals: lb.get(k) in vs)
            else:
                checks.append(lambda lb, k=key, vs=vals: lb.get(k) not in vs)
        elif neg:
            checks.append(lambda lb, k=key: k not in lb)
        else:
            checks.append(lambda lb, k=key: k in lb)
    return lambda labels: all(c(labels) for c in checks)


def selector_from_label_selector(sel: dict[str, Any] | None) -> Matcher:
    """A `metav1.LabelSelector` (matchLabels + matchExpressions) as a matcher."""
    if not sel:
        return lambda labels: False
    checks: list[Matcher] = []
    for k, v in (sel.get("matchLabels") or {}).items():
        checks.append(lambda lb, k=k, v=v: lb.get(k) == v)
    for expr in sel.get("matchExpressions") or []:
        key, op, vals = expr.get("key"), expr.get("operator"), set(expr.get("values") or [])
        if op == "In":
            checks.append(lambda lb, k=key, vs=vals: lb.get(k) in vs)
        elif op == "NotIn":
            checks.append(lambda lb, k=key, vs=vals: lb.get(k) not in vs)
        elif op == "Exists":
            checks.append(lambda lb, k=key: k in lb)
        elif op == "DoesNotExist":
            checks.append(lambda lb, k=key: k not in lb)
    return lambda labels: all(c(labels) for c in checks)


_FIELDS: dict[str, Callable[[dict], Any]] = {
    "metadata.name": lambda o: o.get("metadata", {}).get("name"),
    "metadata.namespace": lambda o: o.get("metadata", {}).get("namespace"),
    "status.phase": lambda o: (o.get("status") or {}).get("phase"),
    "spec.nodeName": lambda o: (o.get("spec") or {}).get("nodeName"),
    # events (core/v1 field names; what `kubectl describe` asks for)
    "involvedObject.name": lambda o: (o.get("involvedObject") or {}).get("name"),
    "involvedObject.namespace": lambda o: (o.get("involvedObject") or {}).get("namespace"),
    "involvedObject.uid": lambda o: (o.get("involvedObject") or {}).get("uid"),
    "involvedObject.kind": lambda o: (o.get("involvedObject") or {}).get("kind"),
    "reason": lambda o: o.get("reason"),
    "type": lambda o: o.get("type"),
    "regarding.name": lambda o: (o.get("involvedObject") or {}).get("name"),
    "regarding.namespace": lambda o: (o.get("involvedObject") or {}).get("namespace"),
    "regarding.uid": lambda o: (o.get("involvedObject") or {}).get("uid"),
    "regarding.kind": lambda o: (o.get("involvedObject") or {}).get("kind"),
}


def parse_field_selector(text: str | None) -> Callable[[dict], bool]:
    if not text:
        return lambda obj: True
    checks = []
    for req in _split(text):
        m = re.match(r"^([A-Za-z0-9_.]+)\s*(==|!=|=)\s*(.*)$", req)
        if not m:
            raise bad_request(f"invalid field selector: {req!r}")
        field, op, value = m.groups()
        getter = _FIELDS.get(field)
        if getter is None:
            raise ApiError(400, "BadRequest",
                           f'field label not supported: {field}')
        if op == "!=":
            checks.append(lambda o, g=getter, v=value: (g(o) or "") != v)
        else:
            checks.append(lambda o, g=getter, v=value: (g(o) or "") == v)
    return lambda obj: all(c(obj) for c in checks)
