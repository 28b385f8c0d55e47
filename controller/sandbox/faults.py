"""Fault injection for tests, configured per route (HTTP method + path regex).

A rule answers matching requests, up to `count` times (None: until cleared), with
added latency, an error status (5xx, or 429 with Retry-After), a forced 409 Conflict,
or — for watch requests — a stream that is cut off after its first events. Rules are
set in-process (`server.faults.add(…)`) or over HTTP (`POST /_sandbox/faults` with a
JSON object or list of objects using the same names in camelCase, `DELETE` to clear,
`GET` to list), so a sandbox running in another process can be driven too.
"""

from __future__ import annotations

import re
import threading
from dataclasses import asdict, dataclass
from typing import Any


@dataclass
class FaultRule:
    method: str
    path_regex: str
    status: int | None = None
    count: int | None = 1
    latency: float = 0.0
    retry_after: int | None = None
    conflict: bool = False
    drop_watch: bool = False
    hits: int = 0

    def matches(self, method: str, path: str) -> bool:
        return (self.method in ("*", method.upper())) and re.search(self.path_regex, path) \
            is not None

    def to_json(self) -> dict[str, Any]:
        d = asdict(self)
        return {"method": d["method"], "path": d["path_regex"], "status": d["status"],
                "count": d["count"], "latency": d["latency"], "retryAfter": d["retry_after"],
                "conflict": d["conflict"], "dropWatch": d["drop_watch"], "hits": d["hits"]}


class Faults:
    """The active fault rules of one sandbox server."""

    def __init__(self) -> None:
        self._rules: list[FaultRule] = []
        self._lock = threading.Lock()

    def add(self, method: str, path_regex: str, *, status: int | None = None, count: int | None = 1,
            latency: float = 0.0, retry_after: int | None = None, conflict: bool = False,
            drop_watch: bool = False) -> FaultRule:
        """Add a rule. `method` is an HTTP method or "*"; `path_regex` is searched in the
        request path (without the query). `count=None` keeps the rule until `clear()`."""
        if status is not None and not 100 <= int(status) <= 599:
            raise ValueError(f"status must be an HTTP status code, got {status!r}")
        if retry_after is not None and status is None:
            status = 429
        re.compile(path_regex)
        rule = FaultRule(method.upper(), path_regex, status=status, count=count,
                         latency=float(latency), retry_after=retry_after, conflict=conflict,
                         drop_watch=drop_watch)
        with self._lock:
            self._rules.append(rule)
        return rule

    def add_json(self, spec: dict[str, Any]) -> FaultRule:
        known = {"method", "path", "status", "count", "latency", "retryAfter", "conflict",
                 "dropWatch"}
        unknown = set(spec) - known
        if unknown:
            raise ValueError(f"unknown fault fields {sorted(unknown)}; known: {sorted(known)}")
        return self.add(spec.get("method", "*"), spec.get("path", ".*"),
                        status=spec.get("status"), count=spec.get("count", 1),
                        latency=spec.get("latency", 0.0), retry_after=spec.get("retryAfter"),
                        conflict=bool(spec.get("conflict", False)),
                        drop_watch=bool(spec.get("dropWatch", False)))

    def clear(self) -> None:
        with self._lock:
            self._rules.clear()

    @property
    def rules(self) -> list[FaultRule]:
        with self._lock:
            return list(self._rules)

    def take(self, method: str, path: str, *, watch: bool) -> FaultRule | None:
        """The first matching rule (used up by one), or None."""
        with self._lock:
            for rule in self._rules:
                if rule.drop_watch and not watch:
                    continue
                if rule.count is not None and rule.count <= 0:
                    continue
                if rule.matches(method, path):
                    rule.hits += 1
                    if rule.count is not None:
                        rule.count -= 1
                    return rule
        return None
