"""The sandbox's object store: objects by resource, one global resourceVersion
counter, and a bounded history of changes that watches read from.

Like etcd behind a real API server, every write gets the next revision (a global
counter, emitted as a string in `metadata.resourceVersion`); the history keeps the
last `history` changes, and a watch that asks for an older revision gets
410 Gone (reason Expired). Reads return deep copies, so callers may mutate them.
"""

from __future__ import annotations

import copy
import threading
from collections import deque
from dataclasses import dataclass
from typing import Any

from ratefit.controller.sandbox.resources import BUILTINS, ResourceType

Key = tuple[str, str]  # (group, plural)


def _clone(obj: Any) -> Any:
    """A deep copy of stored JSON data."""
    return copy.deepcopy(obj)


@dataclass(frozen=True)
class Change:
    """One recorded write: what a watch turns into ADDED / MODIFIED / DELETED."""

    rv: int
    key: Key
    type: str
    obj: dict[str, Any]
    old: dict[str, Any] | None


class Store:
    """Objects, the revision counter, the change history and the served resource types."""

    def __init__(self, *, history: int = 1000) -> None:
        self.lock = threading.RLock()
        self.changed = threading.Condition(self.lock)
        self._rv = 1
        self._objects: dict[Key, dict[tuple[str, str], dict[str, Any]]] = {}
        self._history: deque[Change] = deque()
        self._history_max = history
        #: the highest revision no longer in the history (a watch from below it gets 410)
        self.compacted = 0
        #: owner uid -> (key, namespace, name) of the objects naming it in ownerReferences
        self._dependents: dict[str, set[tuple[Key, str, str]]] = {}
        self.types: dict[tuple[str, str, str], ResourceType] = {}
        for rt in BUILTINS:
            self.register(rt)
        self.closed = False

    # --- resource types -----------------------------------------------------------------
    def register(self, rt: ResourceType) -> None:
        with self.lock:
            self.types[(rt.group, rt.version, rt.plural)] = rt

    def unregister_group_plural(self, group: str, plural: str) -> None:
        with self.lock:
            for k in [k for k in self.types if k[0] == group and k[2] == plural]:
                del self.types[k]

    def find_type(self, group: str, version: str, plural: str) -> ResourceType | None:
        return self.types.get((group, version, plural))

    def type_for_kind(self, api_version: str, kind: str) -> ResourceType | None:
        group, _, version = api_version.rpartition("/")
        for rt in list(self.types.values()):
            if rt.group == group and rt.version == version and rt.kind == kind:
                return rt
        return None

    # --- revisions ----------------------------------------------------------------------
    @property
    def resource_version(self) -> int:
        return self._rv

    def next_rv(self) -> int:
        with self.lock:
            self._rv += 1
            return self._rv

    # --- objects ------------------------------------------------------------------------
    def get(self, group: str, plural: str, namespace: str | None, name: str) -> dict | None:
        """A copy of one stored object, or None (for tests: read what the server holds)."""
        with self.lock:
            obj = self._objects.get((group, plural), {}).get((namespace or "", name))
            return _clone(obj) if obj is not None else None

    def list(self, group: str, plural: str, namespace: str | None = None) -> list[dict]:
        """Copies of the stored objects of a resource, optionally in one namespace."""
        with self.lock:
            items = self._objects.get((group, plural), {})
            out = [_clone(o) for (ns, _), o in sorted(items.items())
                   if namespace is None or ns == namespace]
            return out

    def iter_raw(self, key: Key, namespace: str | None = None) -> list[dict]:
        """The stored objects themselves (do not mutate), ordered by namespace/name."""
        with self.lock:
            items = self._objects.get(key, {})
            return [o for (ns, _), o in sorted(items.items())
                    if namespace is None or ns == namespace]

    def raw(self, key: Key, namespace: str, name: str) -> dict | None:
        return self._objects.get(key, {}).get((namespace, name))

    def save(self, key: Key, obj: dict, old: dict | None) -> dict:
        """Store `obj` under a fresh revision; records ADDED or MODIFIED. Returns a copy."""
        with self.lock:
            rv = self.next_rv()
            obj = _clone(obj)
            obj["metadata"]["resourceVersion"] = str(rv)
            md = obj["metadata"]
            where = (key, md.get("namespace", ""), md["name"])
            self._index(where, old, add=False)
            self._index(where, obj, add=True)
            self._objects.setdefault(key, {})[(md.get("namespace", ""), md["name"])] = obj
            self._record(Change(rv, key, "MODIFIED" if old is not None else "ADDED",
                                obj, old))
            return _clone(obj)

    def remove(self, key: Key, namespace: str, name: str) -> dict | None:
        """Delete an object under a fresh revision; records DELETED. Returns it."""
        with self.lock:
            old = self._objects.get(key, {}).pop((namespace, name), None)
            if old is None:
                return None
            self._index((key, namespace, name), old, add=False)
            rv = self.next_rv()
            gone = _clone(old)
            gone["metadata"]["resourceVersion"] = str(rv)
            self._record(Change(rv, key, "DELETED", gone, old))
            return _clone(gone)

    def _index(self, where: tuple[Key, str, str], obj: dict | None, *, add: bool) -> None:
        for ref in ((obj or {}).get("metadata", {}).get("ownerReferences") or []):
            uid = ref.get("uid")
            if not uid:
                continue
            if add:
                self._dependents.setdefault(uid, set()).add(where)
            else:
                deps = self._dependents.get(uid)
                if deps is not None:
                    deps.discard(where)
                    if not deps:
                        del self._dependents[uid]

    def dependents(self, uid: str, key: Key | None = None) -> list[dict]:
        """The stored objects (not copies: do not mutate) owned by `uid`, by name."""
        with self.lock:
            out = []
            for k, ns, name in sorted(self._dependents.get(uid, ())):
                if key is None or k == key:
                    obj = self._objects.get(k, {}).get((ns, name))
                    if obj is not None:
                        out.append(obj)
            return out

    def dependent_keys(self, uid: str) -> list[tuple[Key, str, str]]:
        with self.lock:
            return sorted(self._dependents.get(uid, ()))

    def _record(self, change: Change) -> None:
        self._history.append(change)
        while len(self._history) > self._history_max:
            self.compacted = self._history.popleft().rv
        self.changed.notify_all()

    def changes_after(self, rv: int) -> list[Change] | None:
        """Changes with revision > rv, or None if some were already compacted away."""
        with self.lock:
            if rv < self.compacted:
                return None
            return [c for c in self._history if c.rv > rv]

    def compact(self) -> None:
        """Forget the whole history (tests use this to provoke 410 Gone)."""
        with self.lock:
            self._history.clear()
            self.compacted = self._rv

    def close(self) -> None:
        with self.lock:
            self.closed = True
            self.changed.notify_all()
