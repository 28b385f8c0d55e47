"""One LIST+WATCH loop (an informer) for one resource in one scope, and the read-only
values it hands out; ``controller/kube_cache.py`` runs one per kind and namespace.

Per informer (the reflector pattern of the Kubernetes client libraries, written here
because the Python client has no informer cache — DESIGN.md "Kubernetes facts"):

1. a paged LIST (``limit``/``continue``, 500 a page) replaces the informer's store at
   once, and gives the resourceVersion to watch from;
2. a WATCH from that resourceVersion with ``allowWatchBookmarks=true``; each ADDED /
   MODIFIED / DELETED updates the store, each BOOKMARK (which carries only
   ``metadata.resourceVersion``) moves the position; the server ends each watch after
   ``timeoutSeconds`` (5-10 min, jittered) and it is reopened from the last position;
3. a dropped stream (connection cut, read timeout) is resumed from the last
   resourceVersion seen — nothing was missed, so no LIST is needed; if the server
   answers that position with 410 Gone (or any other watch ERROR, e.g. 504 "Too large
   resource version" after a server restart), the informer LISTs again (a relist);
4. every ``resync_s`` (default 10 min, 0: never) a full relist, so a store that ever
   drifted converges; temporary errors back off (capped, jittered) and retry for ever.

Values handed out are shared, never copied: :func:`freeze` turns their dicts and lists
into :class:`FrozenDict` / :class:`FrozenList`, which refuse changes (copies are plain).
An object the converter cannot read is left out and counted — it never holds the others.
"""

from __future__ import annotations

import copy
import logging
import random
import sys
import threading
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import orjson
from kubernetes.client.exceptions import ApiException
from kubernetes.watch.watch import iter_resp_lines
from urllib3.exceptions import HTTPError as Urllib3Error

from ratefit.controller.errors import KubeError, KubeGone
from ratefit.controller.kube_retry import RetryPolicy, call_with_retry, translate
from ratefit.models.errors import InputError

__all__ = ["Informer", "InformerStats", "Change", "FrozenDict", "FrozenList", "freeze"]

log = logging.getLogger("ratefit.controller.cache")

_PAGE = 500
#: what a converter raises on an object it cannot read
_BAD_OBJECT = (InputError, KeyError, TypeError, ValueError, AttributeError)


# -------------------------------------------------------------------- frozen values
def _refuse(self: Any, *args: Any, **kwargs: Any) -> Any:
    raise TypeError("this value is shared by the watch-fed cache and read-only; copy it first (dict(x), list(x))")


class FrozenDict(dict):  # type: ignore[type-arg]
    """A dict that refuses changes (it is a ``dict``: JSON, pydantic and ``==`` work as
    usual). Copies (``dict(x)``, ``copy.copy``, ``copy.deepcopy``) are plain dicts."""

    __slots__ = ()
    __setitem__ = __delitem__ = clear = pop = popitem = setdefault = update = __ior__ = _refuse  # type: ignore[assignment]

    def __copy__(self) -> dict[Any, Any]:
        return dict(self)

    def __deepcopy__(self, memo: dict[int, Any]) -> dict[Any, Any]:
        return {k: copy.deepcopy(v, memo) for k, v in self.items()}

    def __reduce__(self) -> Any:
        return (dict, (dict(self),))


class FrozenList(list):  # type: ignore[type-arg]
    """A list that refuses changes; copies are plain lists (see :class:`FrozenDict`)."""

    __slots__ = ()
    __setitem__ = __delitem__ = __iadd__ = __imul__ = _refuse  # type: ignore[assignment]
    append = extend = insert = pop = remove = clear = sort = reverse = _refuse  # type: ignore[assignment]

    def __copy__(self) -> list[Any]:
        return list(self)

    def __deepcopy__(self, memo: dict[int, Any]) -> list[Any]:
        return [copy.deepcopy(v, memo) for v in self]

    def __reduce__(self) -> Any:
        return (list, (list(self),))


def freeze(value: Any) -> Any:
    """``value`` with every dict/list inside it made read-only (FrozenDict/FrozenList);
    short strings are interned (10,000 policies repeat "dry-run", "Deployment", "30m" …)."""
    if isinstance(value, dict):
        return FrozenDict((k, freeze(v)) for k, v in value.items())
    if isinstance(value, list):
        return FrozenList(freeze(v) for v in value)
    if type(value) is str and len(value) <= 40:
        return sys.intern(value)
    return value


# -------------------------------------------------------------------- one informer
@dataclass
class InformerStats:
    """Counters of one informer (read by the controller's /metrics)."""

    lists: int = 0  #: LISTs completed (the first one and every relist)
    relists: int = 0  #: LISTs after the first: 410 Gone, a watch ERROR, a resync
    resyncs: int = 0  #: relists because the resync period was up
    gone: int = 0  #: 410 Gone answers (the watch position had expired)
    watches: int = 0  #: watch requests opened
    drops: int = 0  #: watch streams cut before the server ended them (resumed)
    errors: int = 0  #: failed LIST/WATCH requests and watch ERROR events
    events: int = 0  #: ADDED/MODIFIED/DELETED events applied
    bookmarks: int = 0
    bad_objects: int = 0  #: objects the converters could not read (left out)
    objects: int = 0  #: objects held now


@dataclass(frozen=True)
class Change:
    """One change of an informer's store: ADDED, MODIFIED or DELETED."""

    type: str
    key: tuple[str, str]
    old: Any
    new: Any


class _Dropped(Exception):
    """The watch stream broke before the server closed it."""


class Informer:
    """LIST then WATCH one resource in one scope (a namespace, or the cluster when
    ``namespace`` is None) on its own thread, keeping the converted objects.

    ``call(**kwargs)`` is the client's list function for that resource and scope (it
    takes ``limit``, ``_continue``, ``watch``, ``resource_version``, … and
    ``_preload_content=False``). ``on_changes(changes, initial)`` is called on the
    informer's thread after each event or relist (``initial``: the first LIST)."""

    def __init__(
        self,
        *,
        resource: str,
        namespace: str | None,
        call: Callable[..., Any],
        convert: Callable[[Mapping[str, Any]], Any],
        on_changes: Callable[[list[Change], bool], None] | None = None,
        resync_s: float = 600.0,
        watch_timeout_s: float = 300.0,
        request_timeout_s: float = 30.0,
        retry: RetryPolicy = RetryPolicy(max_delay=30.0),
        rng: Callable[[], float] = random.random,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.resource = resource
        self.namespace = namespace
        self.what = f"{resource} in {namespace}" if namespace else f"{resource} in all namespaces"
        self._call = call
        self._convert = convert
        self._on_changes = on_changes
        self.resync_s = float(resync_s)
        self.watch_timeout_s = float(watch_timeout_s)
        self._timeout = float(request_timeout_s)
        self._retry = retry
        self._rng = rng
        self._clock = clock
        #: namespace → name → value
        self._items: dict[str, dict[str, Any]] = {}
        self.lock = threading.Lock()
        self.stats = InformerStats()
        #: the position the next watch starts from
        self.resource_version = ""
        self._synced = threading.Event()
        self._stop = threading.Event()
        self._resp: Any = None
        self._thread = threading.Thread(target=self._run, name=f"ratefit-cache-{resource}-{namespace or 'all'}",
                                        daemon=True)

    # -- life ------------------------------------------------------------------------
    def start(self) -> Informer:
        self._thread.start()
        return self

    def stop(self) -> None:
        """Ask the thread to end: also cuts the open watch so it does not wait for the
        server's next event."""
        self._stop.set()
        resp = self._resp
        if resp is not None:
            try:
                resp.shutdown()
            except Exception:  # noqa: BLE001 - already closed
                pass

    def join(self, timeout: float | None = None) -> None:
        if self._thread.is_alive():
            self._thread.join(timeout)

    @property
    def alive(self) -> bool:
        return self._thread.is_alive()

    def has_synced(self) -> bool:
        return self._synced.is_set()

    def wait_synced(self, timeout: float | None) -> bool:
        return self._synced.wait(timeout)

    # -- reads -------------------------------------------------------------------------
    def values(self, namespace: str | None = None) -> list[Any]:
        with self.lock:
            if namespace is not None:
                return list((self._items.get(namespace) or {}).values())
            out: list[Any] = []
            for by_name in self._items.values():
                out.extend(by_name.values())
            return out

    def get(self, namespace: str, name: str) -> Any:
        with self.lock:
            return (self._items.get(namespace) or {}).get(name)

    def put(self, namespace: str, name: str, value: Any) -> None:
        """Store a value a write returned (read-your-writes); the watch's own event for
        that write replaces it with the same content shortly after."""
        with self.lock:
            by_name = self._items.setdefault(namespace, {})
            old = by_name.get(name)
            by_name[name] = value
            self.stats.objects += old is None
        if self._on_changes is not None:
            self._on_changes([Change("ADDED" if old is None else "MODIFIED", (namespace, name), old, value)], False)

    # -- the loop ----------------------------------------------------------------------
    def _run(self) -> None:
        failures = 0
        need_list = True
        next_resync = float("inf")
        rv = ""
        while not self._stop.is_set():
            try:
                if need_list:
                    rv = self._relist()
                    need_list = False
                    failures = 0
                    next_resync = self._clock() + self.resync_s if self.resync_s > 0 else float("inf")
                left = next_resync - self._clock()
                if left <= 0:
                    need_list = True
                    self.stats.resyncs += 1
                    continue
                # client-go's reflector: a server-side timeout of 5-10 min, jittered
                timeout = min(left, self.watch_timeout_s * (1.0 + self._rng()))
                opened, events = self._clock(), self.stats.events + self.stats.bookmarks
                rv = self._watch(rv, max(1, int(timeout)))
                if self._clock() - opened < 1.0 and self.stats.events + self.stats.bookmarks == events:
                    # ended at once with nothing in it: never spin on a server that does that
                    self._pause(failures + 1)
                    failures += 1
                else:
                    failures = 0
            except _Dropped as exc:
                self.stats.drops += 1
                log.info("%s: watch stream dropped (%s); resuming from resourceVersion %s", self.what, exc, rv)
                self._pause(failures)
                failures += 1
            except KubeGone as exc:
                self.stats.gone += 1
                log.info("%s: %s; listing again", self.what, exc)
                need_list = True
                self._pause(failures)
                failures += 1
            except KubeError as exc:
                if self._stop.is_set():
                    break
                self.stats.errors += 1
                log.warning("%s: %s; retrying", self.what, exc)
                self._pause(failures, retry_after=exc.retry_after)
                failures += 1
            except Exception:  # noqa: BLE001 - a bug must not end the thread silently
                if self._stop.is_set():
                    break
                self.stats.errors += 1
                log.exception("%s: unexpected error; listing again", self.what)
                need_list = True
                self._pause(failures)
                failures += 1

    def _pause(self, failures: int, *, retry_after: float | None = None) -> None:
        if failures == 0 and retry_after is None:
            return  # the first resume or relist goes at once
        self._stop.wait(self._retry.delay(failures, retry_after=retry_after, rng=self._rng))

    def _get_json(self, **kwargs: Any) -> dict[str, Any]:
        resp = self._call(_preload_content=False, _request_timeout=self._timeout, **kwargs)
        try:
            return orjson.loads(resp.data) if resp.data else {}
        finally:
            resp.release_conn()

    def _relist(self) -> str:
        """LIST every page, converting each page as it arrives (only one page of raw JSON
        is ever held), then swap the store in one step; returns the list's resourceVersion."""
        fresh: dict[str, dict[str, Any]] = {}
        count = 0
        token: str | None = None
        while True:
            page = call_with_retry(lambda: self._get_json(limit=_PAGE, _continue=token), what=f"list {self.what}",
                                   policy=self._retry, sleep=self._stop.wait, rng=self._rng)
            for obj in page.get("items") or []:
                meta = obj.get("metadata") or {}
                ns, name = meta.get("namespace") or "", meta.get("name") or ""
                try:
                    value = self._convert(obj)
                except _BAD_OBJECT as exc:
                    self.stats.bad_objects += 1
                    log.warning("%s: %s/%s left out of the cache: %s", self.what, ns, name, exc)
                    continue
                fresh.setdefault(ns, {})[name] = value
                count += 1
            meta = page.get("metadata") or {}
            token = meta.get("continue") or None
            del page
            if not token:
                rv = str(meta.get("resourceVersion") or "")
                break
        with self.lock:
            old = self._items
            self._items = fresh
            self.stats.objects = count
            self.resource_version = rv
        initial = not self._synced.is_set()
        self.stats.lists += 1
        if not initial:
            self.stats.relists += 1
        if self._on_changes is not None:
            changes = _diff(old, fresh)
            if changes:
                self._on_changes(changes, initial)
        self._synced.set()
        return rv

    def _watch(self, rv: str, timeout_s: int) -> str:
        """One watch request from ``rv`` until the server ends it; returns the last
        resourceVersion seen. Raises KubeGone (410), KubeError (another watch ERROR:
        the caller lists again) or _Dropped."""
        self.stats.watches += 1
        try:
            resp = self._call(watch=True, resource_version=rv, allow_watch_bookmarks=True, timeout_seconds=timeout_s,
                              _preload_content=False, _request_timeout=(self._timeout, timeout_s + 30))
        except (ApiException, Urllib3Error, ConnectionError, TimeoutError) as exc:
            raise translate(exc, what=f"watch {self.what}") from exc  # 410 → KubeGone → relist
        self._resp = resp
        try:
            if self._stop.is_set():
                return rv
            for line in iter_resp_lines(resp):
                if not line:
                    continue
                event = orjson.loads(line)
                etype = event.get("type")
                obj = event.get("object") or {}
                if etype == "ERROR":
                    if obj.get("code") == 410:
                        raise KubeGone(str(obj.get("message") or "too old resource version"), status=410,
                                       reason=obj.get("reason"), what=f"watch {self.what}")
                    self.stats.errors += 1
                    exc = ApiException(status=obj.get("code"), reason=obj.get("reason"))
                    exc.body = orjson.dumps(obj)
                    err = translate(exc, what=f"watch {self.what}")
                    # any other watch error (e.g. 504 "Too large resource version" after a
                    # server restart): the position cannot be trusted — list again
                    raise KubeGone(err.server_message, status=err.status, reason=err.reason, what=err.what)
                meta = obj.get("metadata") or {}
                new_rv = meta.get("resourceVersion")
                if etype == "BOOKMARK":
                    self.stats.bookmarks += 1
                else:
                    self._apply(etype, obj, meta)
                if new_rv:
                    rv = str(new_rv)
                    self.resource_version = rv
        except (Urllib3Error, ConnectionError, TimeoutError, orjson.JSONDecodeError) as exc:
            if self._stop.is_set():
                return rv
            raise _Dropped(f"{type(exc).__name__}: {exc}") from exc
        finally:
            self._resp = None
            try:
                resp.close()
                resp.release_conn()
            except Exception:  # noqa: BLE001 - closing a dead connection
                pass
        return rv

    def _apply(self, etype: str | None, obj: Mapping[str, Any], meta: Mapping[str, Any]) -> None:
        ns, name = meta.get("namespace") or "", meta.get("name") or ""
        value = None
        if etype in ("ADDED", "MODIFIED"):
            try:
                value = self._convert(obj)
            except _BAD_OBJECT as exc:
                self.stats.bad_objects += 1
                log.warning("%s: %s/%s left out of the cache: %s", self.what, ns, name, exc)
        elif etype != "DELETED":
            return
        self.stats.events += 1
        with self.lock:
            by_name = self._items.setdefault(ns, {})
            old = by_name.get(name)
            if value is None:
                by_name.pop(name, None)
                if not by_name:
                    del self._items[ns]
            else:
                by_name[name] = value
            self.stats.objects += (value is not None) - (old is not None)
        if self._on_changes is not None and (old is not None or value is not None):
            kind = "DELETED" if value is None else ("ADDED" if old is None else "MODIFIED")
            self._on_changes([Change(kind, (ns, name), old, value)], False)


def _diff(old: Mapping[str, Mapping[str, Any]], new: Mapping[str, Mapping[str, Any]]) -> list[Change]:
    out: list[Change] = []
    for ns, by_name in new.items():
        before = old.get(ns) or {}
        for name, value in by_name.items():
            prev = before.get(name)
            if prev is None:
                out.append(Change("ADDED", (ns, name), None, value))
            elif prev != value:
                out.append(Change("MODIFIED", (ns, name), prev, value))
    for ns, by_name in old.items():
        after = new.get(ns) or {}
        for name, value in by_name.items():
            if name not in after:
                out.append(Change("DELETED", (ns, name), value, None))
    return out
