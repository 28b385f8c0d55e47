"""The watch-fed cache: what ``ratefit run`` reads every pass, kept up to date by watches
instead of a LIST of the cluster per pass (issue 8; DESIGN.md "Scale path").

What it follows, each kind in each scope on its own thread (an :class:`Informer`):

* SizingPolicies (``ratefit.dev/v1alpha1``), Deployments, StatefulSets and
  autoscaling/v2 HorizontalPodAutoscalers — in every namespace given by ``--namespace``
  (one LIST+WATCH per namespace and kind; with a namespace list there is NEVER a
  cluster-wide request: namespace-scoped RBAC refuses those), else cluster-wide;
* pods only where a policy asks for ``method: in-place``: one pod informer per
  namespace that holds at least one such policy, started and stopped as policies come
  and go (watching pods per label selector would cost one watch per workload; watching
  all pods of the cluster would hold every pod in memory). Until a namespace's pod
  informer has synced, :meth:`KubeCache.list_pods` asks the API server (``live``).

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

Reads are dictionary lookups under a short lock (indexed by kind, then namespace,
then name) and return the values the adapter's reads return (``controller/workload.py``
frozen dataclasses, built by ``controller/kube.py``'s converters), shared, never
copied: their mappings (annotations, a policy's spec and status, resize conditions)
are frozen :class:`FrozenDict` / :class:`FrozenList` values that refuse mutation, so
one reader can never change what the next one sees. An object the converters cannot
read (a bad quantity, a container without a name) is left out and counted — it never
holds the others.

:class:`CachedKube` puts the cache and the adapter behind one object: reads from the
cache, writes to the API server through the adapter. What a write returns is put into
the cache at once (read-your-writes: the next pass never sees our own status write as
missing), and a 409 Conflict marks the workload so the next ``read_workload`` of it
goes to the API server (a stale cache would otherwise answer the re-read with the same
stale object).

Memory: only the converted values are kept; each LIST page's raw JSON is dropped as soon
as it is converted. Measured (``tests/bench/bench_cache.py``): 41 MB of RSS for 10,000
SizingPolicies + 10,000 Deployments after the first sync (about 4 KB a pair); policies
grow with their status once the controller has written it.
"""

from __future__ import annotations

import copy
import logging
import random
import sys
import threading
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import orjson
from kubernetes import client as k8s
from kubernetes.client.exceptions import ApiException
from kubernetes.watch.watch import iter_resp_lines
from urllib3.exceptions import HTTPError as Urllib3Error

from ratefit.controller.errors import KubeConflict, KubeError, KubeGone, KubeNotFound, KubeUnavailable
from ratefit.controller.kube import (
    POLICY_GROUP,
    POLICY_PLURAL,
    POLICY_VERSION,
    KubeAdapter,
    hpa_from_json,
    pod_from_json,
    policy_from_json,
    workload_from_json,
)
from ratefit.controller.kube_retry import RetryPolicy, call_with_retry, translate
from ratefit.controller.workload import (
    HorizontalScaler,
    Pod,
    PolicyList,
    PolicyObject,
    Workload,
    WorkloadKind,
)
from ratefit.models.errors import InputError

__all__ = [
    "KubeCache",
    "CachedKube",
    "CacheNotSynced",
    "Informer",
    "InformerStats",
    "FrozenDict",
    "FrozenList",
    "POLICIES",
    "DEPLOYMENTS",
    "STATEFULSETS",
    "HPAS",
    "PODS",
]

log = logging.getLogger("ratefit.controller.cache")

POLICIES = "sizingpolicies"
DEPLOYMENTS = "deployments"
STATEFULSETS = "statefulsets"
HPAS = "horizontalpodautoscalers"
PODS = "pods"
_CORE = (POLICIES, DEPLOYMENTS, STATEFULSETS, HPAS)
_WORKLOAD_KIND = {WorkloadKind.DEPLOYMENT: DEPLOYMENTS, WorkloadKind.STATEFULSET: STATEFULSETS}
_PAGE = 500
#: what a converter raises on an object it cannot read
_BAD_OBJECT = (InputError, KeyError, TypeError, ValueError, AttributeError)


class CacheNotSynced(KubeUnavailable):
    """The cache has not finished its first LIST of everything yet (temporary: the
    pass is retried; ``/readyz`` says not ready meanwhile)."""


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


# -------------------------------------------------------------------- converters
@dataclass(frozen=True, slots=True)
class PodEntry:
    """A cached pod: the value ``list_pods`` returns plus what selects it."""

    labels: Mapping[str, str]
    deleting: bool
    pod: Pod


def _convert_policy(obj: Mapping[str, Any]) -> PolicyObject:
    p = policy_from_json(obj)
    return replace(p, spec=freeze(p.spec), status=freeze(p.status))


def _convert_workload(kind: WorkloadKind) -> Callable[[Mapping[str, Any]], Workload]:
    def convert(obj: Mapping[str, Any]) -> Workload:
        w = workload_from_json(obj, kind)
        return replace(w, annotations=FrozenDict(w.annotations))

    return convert


def _convert_pod(obj: Mapping[str, Any]) -> PodEntry:
    meta = obj.get("metadata") or {}
    p = pod_from_json(obj)
    return PodEntry(FrozenDict(meta.get("labels") or {}), bool(meta.get("deletionTimestamp")),
                    replace(p, resize_conditions=FrozenDict(p.resize_conditions)))


def _matcher(selector: str) -> Callable[[Mapping[str, str]], bool]:
    """A label matcher for the selector text ``controller/kube.py`` renders for a
    workload (``k=v``, ``k in (a,b)``, ``k notin (a,b)``, ``k``, ``!k``, comma-joined;
    Kubernetes docs, "Labels and Selectors"). An empty selector matches everything."""
    parts: list[str] = []
    depth, start = 0, 0
    for i, ch in enumerate(selector):
        if ch == "(":
            depth += 1
        elif ch == ")":
            depth -= 1
        elif ch == "," and depth == 0:
            parts.append(selector[start:i])
            start = i + 1
    parts.append(selector[start:])
    tests: list[Callable[[Mapping[str, str]], bool]] = []
    for raw in (p.strip() for p in parts):
        if not raw:
            continue
        if " notin (" in raw or " in (" in raw:
            neg = " notin (" in raw
            key, _, rest = raw.partition(" notin (" if neg else " in (")
            values = frozenset(v.strip() for v in rest.rstrip(")").split(",") if v.strip())
            key = key.strip()
            if neg:
                tests.append(lambda lab, k=key, vs=values: lab.get(k) not in vs)
            else:
                tests.append(lambda lab, k=key, vs=values: lab.get(k) in vs)
        elif raw.startswith("!"):
            tests.append(lambda lab, k=raw[1:].strip(): k not in lab)
        elif "=" in raw:
            key, _, value = raw.partition("=")
            key, value = key.rstrip("!=").strip(), value.lstrip("=").strip()
            if raw.partition("=")[0].endswith("!"):
                tests.append(lambda lab, k=key, v=value: lab.get(k) != v)
            else:
                tests.append(lambda lab, k=key, v=value: lab.get(k) == v)
        else:
            tests.append(lambda lab, k=raw: k in lab)
    return lambda labels: all(t(labels) for t in tests)


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


# -------------------------------------------------------------------- the cache
@dataclass(frozen=True)
class _Resource:
    namespaced: Callable[..., Any]
    cluster: Callable[..., Any] | None
    convert: Callable[[Mapping[str, Any]], Any]


def _resources(api_client: k8s.ApiClient) -> dict[str, _Resource]:
    apps, core = k8s.AppsV1Api(api_client), k8s.CoreV1Api(api_client)
    custom, hpa = k8s.CustomObjectsApi(api_client), k8s.AutoscalingV2Api(api_client)
    return {
        POLICIES: _Resource(
            lambda ns, **kw: custom.list_namespaced_custom_object(POLICY_GROUP, POLICY_VERSION, ns, POLICY_PLURAL, **kw),
            lambda **kw: custom.list_cluster_custom_object(POLICY_GROUP, POLICY_VERSION, POLICY_PLURAL, **kw),
            _convert_policy),
        DEPLOYMENTS: _Resource(apps.list_namespaced_deployment, apps.list_deployment_for_all_namespaces,
                               _convert_workload(WorkloadKind.DEPLOYMENT)),
        STATEFULSETS: _Resource(apps.list_namespaced_stateful_set, apps.list_stateful_set_for_all_namespaces,
                                _convert_workload(WorkloadKind.STATEFULSET)),
        HPAS: _Resource(hpa.list_namespaced_horizontal_pod_autoscaler,
                        hpa.list_horizontal_pod_autoscaler_for_all_namespaces, hpa_from_json),
        PODS: _Resource(core.list_namespaced_pod, None, _convert_pod),
    }


@dataclass(frozen=True)
class CacheStats:
    """A snapshot of the cache's counters, per resource (all scopes summed)."""

    synced: bool
    per_resource: Mapping[str, InformerStats] = field(default_factory=dict)

    def total(self, name: str) -> int:
        return sum(getattr(s, name) for s in self.per_resource.values())


class KubeCache:
    """The read side of the Kubernetes adapter, fed by watches (see the module docstring).

    Reads — ``list_policies``, ``list_workloads``, ``read_workload``, ``list_hpas``,
    ``list_pods`` — take the same arguments and return the same types as
    :class:`~ratefit.controller.kube.KubeAdapter`'s. Before :meth:`has_synced` they
    raise :class:`CacheNotSynced`. A namespace outside ``namespaces`` is read from
    ``live`` (the adapter) when given, else refused with a clear error.

    ``on_policy_change()`` is called (on a cache thread) when a SizingPolicy is added,
    deleted or its spec changes (its ``generation`` moves) — not for status writes;
    ``ratefit run`` passes the loop's ``wake``.
    """

    def __init__(
        self,
        api_client: k8s.ApiClient,
        *,
        namespaces: Sequence[str] = (),
        live: Any = None,
        resync_s: float = 600.0,
        watch_timeout_s: float = 300.0,
        request_timeout_s: float = 30.0,
        retry: RetryPolicy = RetryPolicy(max_delay=30.0),
        rng: Callable[[], float] = random.random,
        on_policy_change: Callable[[], None] | None = None,
        owns_client: bool = False,
    ) -> None:
        self.api_client = api_client
        self.namespaces: tuple[str, ...] = tuple(dict.fromkeys(n for n in namespaces if n))
        self.live = live
        self.on_policy_change = on_policy_change
        self._owns_client = owns_client
        self._opts = dict(resync_s=resync_s, watch_timeout_s=watch_timeout_s, request_timeout_s=request_timeout_s,
                          retry=retry, rng=rng)
        self._res = _resources(api_client)
        self._lock = threading.Lock()
        self._stale: set[tuple[str, str, str]] = set()
        self._started = False
        self._stopped = False
        scopes: list[str | None] = list(self.namespaces) or [None]
        #: resource → scope (namespace or None) → informer
        self._informers: dict[str, dict[str | None, Informer]] = {
            r: {ns: self._informer(r, ns) for ns in scopes} for r in _CORE}
        #: pod informers by namespace (only namespaces with in-place policies)
        self._pods: dict[str, Informer] = {}
        self._retired: list[Informer] = []
        #: policy key → namespace, for policies with method in-place
        self._in_place: dict[tuple[str, str], str] = {}

    @classmethod
    def for_adapter(cls, adapter: KubeAdapter, **kwargs: Any) -> KubeCache:
        """A cache on its own connection pool (its watches hold connections open for
        minutes) with the adapter's configuration; ``live`` is the adapter."""
        cfg = copy.deepcopy(adapter.api_client.configuration)
        kwargs.setdefault("live", adapter)
        n_ns = max(1, len(kwargs.get("namespaces") or ()))
        cfg.connection_pool_maxsize = max(int(cfg.connection_pool_maxsize or 0), 4 * n_ns + 8)
        kwargs.setdefault("request_timeout_s", getattr(adapter, "_timeout", 30.0))
        return cls(k8s.ApiClient(cfg), owns_client=True, **kwargs)

    def _informer(self, resource: str, namespace: str | None) -> Informer:
        res = self._res[resource]
        if namespace is None:
            call = res.cluster
            if call is None:  # pragma: no cover - pods are always watched per namespace
                raise InputError(f"{resource} are only cached per namespace")
        else:
            call = lambda _ns=namespace, _fn=res.namespaced, **kw: _fn(_ns, **kw)  # noqa: E731
        on_changes = self._on_policy_changes if resource == POLICIES else None
        return Informer(resource=resource, namespace=namespace, call=call, convert=res.convert,
                        on_changes=on_changes, **self._opts)  # type: ignore[arg-type]

    # -- life ------------------------------------------------------------------------
    def start(self) -> KubeCache:
        """Start every informer's thread (returns at once; see :meth:`wait_synced`)."""
        with self._lock:
            if self._started:
                return self
            self._started = True
            informers = [i for by_scope in self._informers.values() for i in by_scope.values()]
        for inf in informers:
            inf.start()
        return self

    def stop(self, timeout: float = 5.0) -> None:
        """Stop every informer and wait (up to ``timeout`` in all) for their threads."""
        with self._lock:
            self._stopped = True
            informers = [i for by_scope in self._informers.values() for i in by_scope.values()]
            informers += list(self._pods.values()) + self._retired
        for inf in informers:
            inf.stop()
        deadline = time.monotonic() + timeout
        for inf in informers:
            inf.join(max(0.0, deadline - time.monotonic()))
        if self._owns_client:
            try:
                self.api_client.close()
            except Exception:  # noqa: BLE001 - closing is best effort
                pass

    def close(self) -> None:
        self.stop()

    def __enter__(self) -> KubeCache:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()

    def has_synced(self) -> bool:
        """Every policy, workload and autoscaler informer has completed its first LIST
        (stays True after: later relists keep serving the previous store meanwhile)."""
        return all(i.has_synced() for by_scope in self._informers.values() for i in by_scope.values())

    def wait_synced(self, timeout: float | None = None) -> bool:
        """Wait until synced — including the pod informers the policies asked for —
        or ``timeout`` seconds; returns whether it is synced."""
        deadline = None if timeout is None else time.monotonic() + timeout
        while True:
            with self._lock:
                informers = [i for by_scope in self._informers.values() for i in by_scope.values()]
                informers += list(self._pods.values())
            for inf in informers:
                left = None if deadline is None else max(0.0, deadline - time.monotonic())
                if not inf.wait_synced(left):
                    return False
            with self._lock:  # pod informers started by the policy LIST meanwhile
                if len(self._pods) + sum(len(s) for s in self._informers.values()) == len(informers):
                    return True

    def stats(self) -> CacheStats:
        """Counters summed per resource (for /metrics)."""
        with self._lock:
            groups = {r: list(s.values()) for r, s in self._informers.items()}
            groups[PODS] = list(self._pods.values()) + [i for i in self._retired if i.resource == PODS]
        out: dict[str, InformerStats] = {}
        for r, infs in groups.items():
            total = InformerStats()
            for inf in infs:
                for f in total.__dataclass_fields__:
                    setattr(total, f, getattr(total, f) + getattr(inf.stats, f))
            out[r] = total
        return CacheStats(synced=self.has_synced(), per_resource=out)

    # -- policies and the pod informers they ask for ------------------------------------
    def _on_policy_changes(self, changes: list[Change], initial: bool) -> None:
        wake = False
        with self._lock:
            for ch in changes:
                if ch.new is not None and (ch.new.spec or {}).get("method") == "in-place":
                    self._in_place[ch.key] = ch.key[0]
                else:
                    self._in_place.pop(ch.key, None)
                if ch.old is None or ch.new is None or ch.old.generation != ch.new.generation:
                    wake = True
            self._sync_pod_informers()
        if wake and not initial and self.on_policy_change is not None:
            try:
                self.on_policy_change()
            except Exception:  # noqa: BLE001 - a wake-up must never break the cache
                log.exception("policy change callback failed")

    def _sync_pod_informers(self) -> None:
        """(under self._lock) one pod informer per namespace with an in-place policy."""
        if self._stopped:
            return
        wanted = set(self._in_place.values())
        for ns in sorted(wanted - set(self._pods)):
            inf = self._informer(PODS, ns)
            self._pods[ns] = inf
            if self._started:
                inf.start()
            log.info("watching pods in %s (a policy there resizes in place)", ns)
        for ns in sorted(set(self._pods) - wanted):
            inf = self._pods.pop(ns)
            inf.stop()
            self._retired.append(inf)
            log.info("no longer watching pods in %s", ns)

    # -- reads --------------------------------------------------------------------------
    def _scope(self, resource: str, namespace: str | None) -> list[tuple[Informer, str | None]]:
        """The informers that hold ``namespace`` (None: every one of the resource),
        with the namespace to filter by."""
        by_scope = self._informers[resource]
        if not self.has_synced():
            raise CacheNotSynced(f"the watch-fed cache has not listed {resource} yet; wait for /readyz",
                                 what=f"read {resource}")
        if namespace is None:
            return [(inf, None) for inf in by_scope.values()]
        if None in by_scope:
            return [(by_scope[None], namespace)]
        if namespace in by_scope:
            return [(by_scope[namespace], None)]
        raise InputError(f"namespace {namespace!r} is not cached (the cache follows {', '.join(self.namespaces)}); "
                         "add it with --namespace")

    def _in_scope(self, namespace: str) -> bool:
        return not self.namespaces or namespace in self.namespaces

    def list_policies(self, namespaces: Sequence[str] | None = None) -> PolicyList:
        """SizingPolicies of the given namespaces (None or empty: every cached one)."""
        wanted = list(dict.fromkeys(namespaces or ()))
        if wanted and self.live is not None and not all(self._in_scope(n) for n in wanted):
            return self.live.list_policies(wanted)  # type: ignore[no-any-return]
        items: list[PolicyObject] = []
        used: list[Informer] = []
        for ns in wanted or [None]:
            for inf, only in self._scope(POLICIES, ns):
                items.extend(inf.values(only))
                used.append(inf)
        rv = used[0].resource_version if len(used) == 1 else ""
        return PolicyList(tuple(items), rv)

    def list_workloads(self, kind: WorkloadKind | str, *, namespace: str | None = None) -> tuple[Workload, ...]:
        kind = kind if isinstance(kind, WorkloadKind) else WorkloadKind.parse(kind)
        if namespace and self.live is not None and not self._in_scope(namespace):
            return self.live.list_workloads(kind, namespace=namespace)  # type: ignore[no-any-return]
        out: list[Workload] = []
        for inf, only in self._scope(_WORKLOAD_KIND[kind], namespace):
            out.extend(inf.values(only))
        return tuple(out)

    def read_workload(self, namespace: str, kind: WorkloadKind | str, name: str) -> Workload:
        """The cached workload; KubeNotFound when the cache does not hold it. After a
        409 on it (:meth:`invalidate`) the next read goes to the API server."""
        kind = kind if isinstance(kind, WorkloadKind) else WorkloadKind.parse(kind)
        resource = _WORKLOAD_KIND[kind]
        key = (resource, namespace, name)
        if self.live is not None and (key in self._stale or not self._in_scope(namespace)):
            fresh: Workload = self.live.read_workload(namespace, kind, name)
            with self._lock:
                self._stale.discard(key)
            if self._in_scope(namespace):
                self.remember(fresh)
            return fresh
        for inf, _ in self._scope(resource, namespace):
            got = inf.get(namespace, name)
            if got is not None:
                return got  # type: ignore[no-any-return]
        raise KubeNotFound(f'{resource}.apps "{name}" not found in the watch-fed cache', status=404,
                           reason="NotFound", what=f"read {kind.value} {namespace}/{name}")

    def list_hpas(self, namespace: str | None = None) -> tuple[HorizontalScaler, ...]:
        if namespace and self.live is not None and not self._in_scope(namespace):
            return self.live.list_hpas(namespace)  # type: ignore[no-any-return]
        out: list[HorizontalScaler] = []
        for inf, only in self._scope(HPAS, namespace):
            out.extend(inf.values(only))
        return tuple(out)

    def find_hpas(self, workload: Workload) -> tuple[HorizontalScaler, ...]:
        return tuple(h for h in self.list_hpas(workload.namespace)
                     if h.target_kind == workload.kind.value and h.target_name == workload.name)

    def list_pods(self, workload: Workload) -> tuple[Pod, ...]:
        """The pods the workload's selector matches (pods being deleted left out), from
        the namespace's pod informer — or from the API server (``live``) while there is
        none or it has not synced (a policy just switched to in-place)."""
        with self._lock:
            inf = self._pods.get(workload.namespace)
        if inf is None or not inf.has_synced():
            if self.live is None:
                raise CacheNotSynced(f"pods in {workload.namespace} are not cached (yet)", what=f"list pods of {workload.key}")
            return self.live.list_pods(workload)  # type: ignore[no-any-return]
        match = _matcher(workload.selector)
        entries = inf.values(workload.namespace)
        return tuple(e.pod for e in sorted(entries, key=lambda e: e.pod.name) if not e.deleting and match(e.labels))

    # -- what writes tell us -------------------------------------------------------------
    def remember(self, value: Workload | PolicyObject | None) -> None:
        """Store what a write returned (a patched workload, a policy after a status
        write), so the next pass reads its own writes even before the watch event."""
        if value is None:
            return
        if isinstance(value, Workload):
            resource, stored = _WORKLOAD_KIND[value.kind], replace(value, annotations=FrozenDict(value.annotations))
        elif isinstance(value, PolicyObject):
            resource, stored = POLICIES, replace(value, spec=freeze(dict(value.spec)), status=freeze(dict(value.status)))
        else:
            return
        if not self._in_scope(value.namespace) or not self.has_synced():
            return
        for inf, _ in self._scope(resource, value.namespace):
            inf.put(value.namespace, value.name, stored)

    def invalidate(self, kind: WorkloadKind | str, namespace: str, name: str) -> None:
        """The workload changed under us (409): read it from the API server next time."""
        kind = kind if isinstance(kind, WorkloadKind) else WorkloadKind.parse(kind)
        with self._lock:
            self._stale.add((_WORKLOAD_KIND[kind], namespace, name))


class CachedKube:
    """Reads from a :class:`KubeCache`, writes through a :class:`KubeAdapter`: one
    object with the adapter's interface, so the reconcile pass (which takes one Kubernetes
    object) reads the cache without knowing it. Everything not named here (Lease,
    identity, revert, events, in-place resizes) is the adapter's."""

    def __init__(self, *, reader: KubeCache, writer: KubeAdapter) -> None:
        self.reader = reader
        self.writer = writer

    def __getattr__(self, name: str) -> Any:
        return getattr(self.writer, name)

    # reads
    def list_policies(self, namespaces: Sequence[str] | None = None) -> PolicyList:
        return self.reader.list_policies(namespaces)

    def list_workloads(self, kind: WorkloadKind | str, *, namespace: str | None = None) -> tuple[Workload, ...]:
        return self.reader.list_workloads(kind, namespace=namespace)

    def read_workload(self, namespace: str, kind: WorkloadKind | str, name: str) -> Workload:
        return self.reader.read_workload(namespace, kind, name)

    def list_hpas(self, namespace: str | None = None) -> tuple[HorizontalScaler, ...]:
        return self.reader.list_hpas(namespace)

    def find_hpas(self, workload: Workload) -> tuple[HorizontalScaler, ...]:
        return self.reader.find_hpas(workload)

    def list_pods(self, workload: Workload) -> tuple[Pod, ...]:
        return self.reader.list_pods(workload)

    # writes (remembered in the cache; a conflict makes the next read go to the server)
    def patch_cpu(self, workload: Workload, changes: Mapping[str, Any], **kwargs: Any) -> Workload:
        try:
            stored = self.writer.patch_cpu(workload, changes, **kwargs)
        except KubeConflict:
            self.reader.invalidate(workload.kind, workload.namespace, workload.name)
            raise
        self.reader.remember(stored)
        return stored

    def annotate_workload(self, workload: Workload, annotations: Mapping[str, str | None]) -> Workload:
        try:
            stored = self.writer.annotate_workload(workload, annotations)
        except KubeConflict:
            self.reader.invalidate(workload.kind, workload.namespace, workload.name)
            raise
        self.reader.remember(stored)
        return stored

    def write_policy_status(self, namespace: str, name: str, status: Mapping[str, Any], **kwargs: Any) -> PolicyObject:
        stored = self.writer.write_policy_status(namespace, name, status, **kwargs)
        self.reader.remember(stored)
        return stored

    def revert(self, namespace: str, kind: WorkloadKind | str, name: str) -> Workload | None:
        stored = self.writer.revert(namespace, kind, name)
        self.reader.remember(stored)
        return stored

    def resize_pods(self, pods: Iterable[Pod], changes: Mapping[str, Any], **kwargs: Any) -> Any:
        return self.writer.resize_pods(pods, changes, **kwargs)

    def close(self) -> None:
        self.reader.stop()
        self.writer.close()
