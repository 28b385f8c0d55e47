"""The watch-fed cache: what ``ratefit run`` reads every pass, kept up to date by watches
instead of a LIST of the cluster per pass (issue 8; DESIGN.md "Scale path").

What it follows, each kind in each scope on its own thread (an :class:`Informer`):

* SizingPolicies (``ratefit.dev/v1alpha1``), Deployments, StatefulSets and
  autoscaling/v2 HorizontalPodAutoscalers — in every namespace given by ``--namespace``
  (one LIST+WATCH per namespace and kind; with a namespace list there is NEVER a
  cluster-wide request: namespace-scoped RBAC refuses those), else cluster-wide;
* pods only where a policy asks for ``resizeBy: InPlace``: one pod informer per
  namespace that holds at least one such policy, started and stopped as policies come
  and go (watching pods per label selector would cost one watch per workload; watching
  all pods of the cluster would hold every pod in memory). Until a namespace's pod
  informer has synced, :meth:`KubeCache.list_pods` asks the API server (``live``).

Each informer (``controller/kube_informer.py``, whose docstring gives the steps) is a
paged LIST, then a WATCH with bookmarks resumed from the last resourceVersion, a relist on
410 Gone or another watch error, and a full relist every ``resync_s`` (default 10 min).

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
import threading
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

from kubernetes import client as k8s

from ratefit.controller.errors import KubeConflict, KubeNotFound, KubeUnavailable
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
from ratefit.controller.kube_informer import Change, FrozenDict, FrozenList, Informer, InformerStats, freeze
from ratefit.controller.kube_retry import RetryPolicy
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


class CacheNotSynced(KubeUnavailable):
    """The cache has not finished its first LIST of everything yet (temporary: the
    pass is retried; ``/readyz`` says not ready meanwhile)."""


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
                if ch.new is not None and (ch.new.spec or {}).get("resizeBy") == "InPlace":
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
