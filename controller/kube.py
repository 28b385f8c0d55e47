"""The Kubernetes adapter: every Kubernetes API call the controller makes goes through
``KubeAdapter``, built on the official ``kubernetes`` client.

What it does (DESIGN.md, "One decision" step 10):

* list / watch SizingPolicies (``ratefit.dev/v1alpha1``, plural ``sizingpolicies``);
  the watch resumes from the last resourceVersion and re-lists on 410 Gone;
* read Deployments / StatefulSets into ``Workload`` values, list their pods, find the
  HorizontalPodAutoscalers (autoscaling/v2) that target them;
* change CPU: a strategic-merge patch of the pod template's containers (merge key
  ``name``) that touches only ``resources.requests.cpu`` / ``resources.limits.cpu``
  and the ``ratefit.dev/previous-requests`` annotation, sent first with
  ``dryRun=All`` and then for real; it carries ``metadata.resourceVersion`` so a stale
  read gets 409 (``KubeConflict``) instead of overwriting someone else's change;
* resize running pods in place through the ``resize`` subresource, one pod at a time;
* write a SizingPolicy's status through the ``status`` subresource (JSON merge patch);
* emit events.k8s.io/v1 Events;
* revert a workload to its annotated previous requests.

Reads use ``_preload_content=False`` and plain JSON: the client's generated models are
slow for thousands of objects and we only need a few fields.

Errors: every failure leaves as a ``KubeError`` (``controller/errors.py``), translated
once in ``kube_retry``. Temporary ones (429, 5xx, connection) are retried with capped,
jittered backoff honouring Retry-After. Conflicts (409) are handed to the caller, who
re-reads and recomputes (a level-based reconcile does that on its own next pass; or wrap
the read-decide-patch step in ``retry_on_conflict``). ``revert`` is the exception: it
owns its whole read-compute-write cycle, so it re-reads and retries conflicts itself.

Previous requests: the annotation records, per container, the CPU request and limit
*before ratefit first changed that container*. Later changes keep the recorded values,
so ``revert`` undoes everything ratefit did, not just its last step. ``revert`` removes
the annotation (the workload is then back at the recorded values; the next ratefit change
records afresh).
"""

from __future__ import annotations

import json
import logging
import os
import random
import socket
import threading
import time
import uuid
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from kubernetes import client as k8s
from kubernetes import config as k8s_config
from kubernetes.client import rest as k8s_rest
from kubernetes.config.config_exception import ConfigException
from kubernetes.watch.watch import iter_resp_lines
from urllib3.exceptions import HTTPError as Urllib3Error
from urllib3.util.retry import Retry

from ratefit.controller.autoscaler import DEFAULT_SCALE_DOWN_WINDOW_S, MAX_STABILIZATION_WINDOW_S
from ratefit.controller.errors import KubeError, KubeGone, KubeNotFound
from ratefit.controller.kube_lease import LeaderElector, micro_time
from ratefit.controller.kube_retry import RetryPolicy, call_with_retry, retry_on_conflict, translate
from ratefit.controller.quantity import format_cpu, parse_cpu
from ratefit.controller.workload import (
    LAST_CHANGE_ANNOTATION,
    PREVIOUS_REQUESTS_ANNOTATION,
    ContainerResources,
    CpuChange,
    EventType,
    HorizontalScaler,
    ObjectRef,
    Pod,
    PodContainer,
    PolicyEvent,
    PolicyList,
    PolicyObject,
    PreviousRequest,
    ResizeOutcome,
    ScalerMetric,
    Workload,
    WorkloadKind,
    encode_previous_requests,
)
from ratefit.controller import crd
from ratefit.models.errors import InputError

__all__ = [
    "KubeAdapter",
    "LeaderElector",
    "RetryPolicy",
    "retry_on_conflict",
    "cpu_patch_body",
    "POLICY_GROUP",
    "POLICY_VERSION",
    "POLICY_PLURAL",
    "REPORTING_CONTROLLER",
    "FIELD_MANAGER",
    "workload_from_json",
    "pod_from_json",
    "hpa_from_json",
    "policy_from_json",
]

log = logging.getLogger(__name__)

# the CRD's coordinates: one home, controller/crd.py
POLICY_GROUP = crd.GROUP
POLICY_VERSION = crd.VERSION
POLICY_PLURAL = crd.PLURAL
#: events.k8s.io/v1 reportingController: "<domain>/<name>" as the Events API asks
REPORTING_CONTROLLER = "ratefit.dev/controller"
FIELD_MANAGER = "ratefit"

_STRATEGIC = "application/strategic-merge-patch+json"
_MERGE = "application/merge-patch+json"
_LIST_PAGE = 500
#: events.k8s.io/v1 limits (API reference, Event v1): note ≤ 1 kB, action/reason ≤ 128
_NOTE_MAX = 1024
_SHORT_MAX = 128


def default_identity() -> str:
    """``<pod or host name>_<random>``, like client-go's leader-election examples."""
    base = os.environ.get("POD_NAME") or socket.gethostname() or "ratefit"
    return f"{base}_{uuid.uuid4().hex[:8]}"


def _own_the_retries(api_client: k8s.ApiClient) -> None:
    """Turn off urllib3's own status retries on the client (by default it silently
    retries 429/503 with Retry-After on GET/PUT, sleeping for real, invisible to our
    backoff, metrics and injected sleep). Connection-level retries stay; reads that fail
    mid-answer come back to ``call_with_retry``. Done once, only if the caller did not
    configure ``retries`` on the client's Configuration."""
    cfg = api_client.configuration
    if cfg.retries is not None:
        return
    cfg.retries = Retry(total=3, connect=3, read=0, redirect=0, status=0, other=0,
                        respect_retry_after_header=False, raise_on_status=False)
    api_client.rest_client.close()
    api_client.rest_client = k8s_rest.RESTClientObject(cfg)


class KubeAdapter:
    """All Kubernetes I/O of the controller. ``identity`` names this replica in Events
    (reportingInstance) and in the Lease. ``clock`` (epoch seconds) stamps Events;
    ``sleep``/``rng`` drive retry backoff (inject them in tests)."""

    def __init__(
        self,
        api_client: k8s.ApiClient,
        *,
        identity: str | None = None,
        retry: RetryPolicy = RetryPolicy(),
        clock: Callable[[], float] = time.time,
        sleep: Callable[[float], None] = time.sleep,
        rng: Callable[[], float] = random.random,
        request_timeout: float = 30.0,
    ) -> None:
        _own_the_retries(api_client)
        self.api_client = api_client
        self.identity = identity or default_identity()
        self.retry = retry
        self._clock = clock
        self._sleep = sleep
        self._rng = rng
        self._timeout = request_timeout
        self._apps = k8s.AppsV1Api(api_client)
        self._core = k8s.CoreV1Api(api_client)
        self._custom = k8s.CustomObjectsApi(api_client)
        self._hpa = k8s.AutoscalingV2Api(api_client)
        self._events = k8s.EventsV1Api(api_client)
        #: one row per workload kind: the apps/v1 calls that read, list and patch it
        self._workload_api = dict(WORKLOAD_CALLS)
        #: retries made (temporary failures waited out) — for the controller's metrics
        self.retries = 0

    # ---------------------------------------------------------------- construction
    @classmethod
    def from_kubeconfig(
        cls, path: str | None = None, *, context: str | None = None, **kwargs: Any
    ) -> KubeAdapter:
        """From a kubeconfig file (``None``: $KUBECONFIG or ~/.kube/config)."""
        cfg = k8s.Configuration()
        try:
            k8s_config.load_kube_config(config_file=path, context=context, client_configuration=cfg)
        except (ConfigException, OSError, TypeError) as exc:
            where = path or os.environ.get("KUBECONFIG") or "~/.kube/config"
            raise InputError(f"kubeconfig {where}: cannot be used ({exc}); pass --kubeconfig FILE") from exc
        return cls(k8s.ApiClient(cfg), **kwargs)

    @classmethod
    def in_cluster(cls, **kwargs: Any) -> KubeAdapter:
        """From the pod's service account (token, CA and KUBERNETES_SERVICE_HOST/PORT)."""
        cfg = k8s.Configuration()
        try:
            k8s_config.load_incluster_config(client_configuration=cfg)
        except ConfigException as exc:
            raise InputError(f"not running in a cluster ({exc}); pass --kubeconfig FILE") from exc
        return cls(k8s.ApiClient(cfg), **kwargs)

    @classmethod
    def from_environment(
        cls, kubeconfig: str | None = None, *, context: str | None = None, **kwargs: Any
    ) -> KubeAdapter:
        """A kubeconfig when one is given (or $KUBECONFIG is set); else in-cluster when
        KUBERNETES_SERVICE_HOST is set; else ~/.kube/config."""
        if kubeconfig or os.environ.get("KUBECONFIG") or not os.environ.get("KUBERNETES_SERVICE_HOST"):
            return cls.from_kubeconfig(kubeconfig, context=context, **kwargs)
        return cls.in_cluster(**kwargs)

    def leader_elector(self, *, namespace: str, name: str = "ratefit-controller", **kwargs: Any) -> LeaderElector:
        """A LeaderElector on this adapter's connection and identity (see kube_lease)."""
        kwargs.setdefault("sleep", self._sleep)
        kwargs.setdefault("rng", self._rng)
        return LeaderElector(self.api_client, namespace=namespace, name=name, identity=self.identity, **kwargs)

    def close(self) -> None:
        self.api_client.close()

    # ---------------------------------------------------------------- plumbing
    def _call(self, what: str, fn: Callable[..., Any], *args: Any, **kwargs: Any) -> dict[str, Any]:
        kwargs.setdefault("_preload_content", False)
        kwargs.setdefault("_request_timeout", self._timeout)

        def once() -> Any:
            resp = fn(*args, **kwargs)
            try:
                return json.loads(resp.data) if resp.data else {}
            finally:
                resp.release_conn()

        def counted(err: KubeError, wait: float) -> None:
            self.retries += 1
            log.info("%s: %s; retrying in %.2fs", what, err, wait)

        return call_with_retry(once, what=what, policy=self.retry, sleep=self._sleep, rng=self._rng, on_retry=counted)

    def _list_all(self, what: str, fn: Callable[..., Any], *args: Any, **kwargs: Any) -> tuple[list[dict[str, Any]], str]:
        """Every item of a list call, following ``continue`` tokens; and the list's resourceVersion."""
        items: list[dict[str, Any]] = []
        token: str | None = None
        while True:
            page = self._call(what, fn, *args, limit=_LIST_PAGE, _continue=token, **kwargs)
            items.extend(page.get("items") or [])
            meta = page.get("metadata") or {}
            token = meta.get("continue") or None
            if not token:
                return items, str(meta.get("resourceVersion") or "")

    def _api_of(self, kind: WorkloadKind) -> _WorkloadApi:
        """The API calls of a workload kind; an unknown kind is an error, never a guess."""
        names = self._workload_api.get(kind)
        if names is None:
            raise InputError(f"workload kind {kind!r} is not supported; use one of "
                             f"{', '.join(k.value for k in self._workload_api)}")
        return _WorkloadApi(*(getattr(self._apps, n) for n in names))

    # ---------------------------------------------------------------- SizingPolicies
    def list_policies(self, namespaces: Sequence[str] | None = None) -> PolicyList:
        """SizingPolicies in the given namespaces (None or empty: all namespaces).
        ``resource_version`` is usable for ``watch_policies`` with all namespaces or
        exactly one; with several namespaces it is "" (watch each one separately)."""
        if not namespaces:
            raw, rv = self._list_all("list sizingpolicies", self._custom.list_cluster_custom_object,
                                     POLICY_GROUP, POLICY_VERSION, POLICY_PLURAL)
        else:
            raw, rvs = [], []
            for ns in dict.fromkeys(namespaces):
                items, rv1 = self._list_all(f"list sizingpolicies in {ns}", self._custom.list_namespaced_custom_object,
                                            POLICY_GROUP, POLICY_VERSION, ns, POLICY_PLURAL)
                raw.extend(items)
                rvs.append(rv1)
            rv = rvs[0] if len(rvs) == 1 else ""
        return PolicyList(tuple(_policy(o) for o in raw), rv)

    def read_policy(self, namespace: str, name: str) -> PolicyObject:
        return _policy(self._call(f"read sizingpolicy {namespace}/{name}", self._custom.get_namespaced_custom_object,
                                  POLICY_GROUP, POLICY_VERSION, namespace, POLICY_PLURAL, name))

    def watch_policies(
        self,
        *,
        namespace: str | None = None,
        resource_version: str | None = None,
        timeout_seconds: int = 60,
        stop: threading.Event | None = None,
    ) -> Iterator[PolicyEvent]:
        """Stream SizingPolicy changes, forever (until ``stop`` is set).

        Without ``resource_version`` it lists first and yields one RELISTED event with
        the list. Each server-side watch lasts ``timeout_seconds`` and is reopened from
        the last resourceVersion seen (events and bookmarks); a 410 Gone re-lists and
        yields RELISTED. Connection trouble is retried with backoff. ``stop`` is checked
        between events and whenever a watch ends — keep ``timeout_seconds`` short if you
        need a prompt stop."""
        what = f"watch sizingpolicies{' in ' + namespace if namespace else ''}"

        def relist() -> PolicyEvent:
            listed = self.list_policies([namespace] if namespace else None)
            return PolicyEvent("RELISTED", None, listed.resource_version, listed)

        rv = resource_version
        if not rv:
            ev = relist()
            rv = ev.resource_version
            yield ev
        failures = 0
        while not (stop and stop.is_set()):
            kwargs: dict[str, Any] = dict(
                watch=True, resource_version=rv, allow_watch_bookmarks=True, timeout_seconds=timeout_seconds,
                _preload_content=False, _request_timeout=(self._timeout, timeout_seconds + 10),
            )
            try:
                if namespace:
                    resp = self._custom.list_namespaced_custom_object(
                        POLICY_GROUP, POLICY_VERSION, namespace, POLICY_PLURAL, **kwargs)
                else:
                    resp = self._custom.list_cluster_custom_object(POLICY_GROUP, POLICY_VERSION, POLICY_PLURAL, **kwargs)
            except Exception as exc:  # translated below; kubernetes/urllib3 errors only
                err = translate(exc, what=what)
                if isinstance(err, KubeGone):
                    ev = relist()
                    rv = ev.resource_version
                    yield ev
                    continue
                if not err.temporary or failures + 1 >= self.retry.max_attempts:
                    raise err from exc
                self._backoff(err, failures)
                failures += 1
                continue
            gone = False
            try:
                for line in iter_resp_lines(resp):
                    if not line:
                        continue
                    event = json.loads(line)
                    etype, obj = event.get("type"), event.get("object") or {}
                    if etype == "ERROR":
                        code = obj.get("code")
                        if code == 410:
                            gone = True
                            break
                        raise translate(k8s.ApiException(status=code, reason=obj.get("reason")), what=what)
                    new_rv = (obj.get("metadata") or {}).get("resourceVersion")
                    if new_rv:
                        rv = new_rv
                    failures = 0
                    if etype == "BOOKMARK":
                        continue
                    yield PolicyEvent(etype, _policy(obj), rv or "")
                    if stop and stop.is_set():
                        return
            except (Urllib3Error, ConnectionError, TimeoutError) as exc:
                err = translate(exc, what=what)
                if failures + 1 >= self.retry.max_attempts:
                    raise err from exc
                self._backoff(err, failures)
                failures += 1
            finally:
                resp.close()
                resp.release_conn()
            if gone:
                ev = relist()
                rv = ev.resource_version
                yield ev

    def _backoff(self, err: KubeError, attempt: int) -> None:
        wait = self.retry.delay(attempt, retry_after=err.retry_after, rng=self._rng)
        self.retries += 1
        log.info("%s; retrying in %.2fs", err, wait)
        self._sleep(wait)

    def write_policy_status(
        self, namespace: str, name: str, status: Mapping[str, Any], *, resource_version: str | None = None
    ) -> PolicyObject:
        """Write ``status`` through the status subresource as a JSON merge patch
        (RFC 7386): every key given replaces the stored one (lists such as conditions
        and proposals are replaced whole — merge conditions by type before calling);
        keys not given are kept; a key set to None is removed. With
        ``resource_version`` the write fails with KubeConflict if the policy changed."""
        body: dict[str, Any] = {"status": dict(status)}
        if resource_version:
            body["metadata"] = {"resourceVersion": resource_version}
        return _policy(self._call(
            f"write status of sizingpolicy {namespace}/{name}", self._custom.patch_namespaced_custom_object_status,
            POLICY_GROUP, POLICY_VERSION, namespace, POLICY_PLURAL, name, body,
            field_manager=FIELD_MANAGER, _content_type=_MERGE))

    # ---------------------------------------------------------------- workloads
    def read_workload(self, namespace: str, kind: WorkloadKind | str, name: str) -> Workload:
        kind = kind if isinstance(kind, WorkloadKind) else WorkloadKind.parse(kind)
        fn = self._api_of(kind).read
        return _workload(self._call(f"read {kind.value} {namespace}/{name}", fn, name, namespace), kind)

    def list_workloads(
        self, kind: WorkloadKind | str, *, namespace: str | None = None, label_selector: str | None = None
    ) -> tuple[Workload, ...]:
        """All Deployments (or StatefulSets) in a namespace or the cluster — one paged
        list instead of one read per workload."""
        kind = kind if isinstance(kind, WorkloadKind) else WorkloadKind.parse(kind)
        api = self._api_of(kind)
        fn = api.list_namespaced if namespace else api.list_all
        args = (namespace,) if namespace else ()
        items, _ = self._list_all(f"list {kind.value}s", fn, *args, label_selector=label_selector)
        return tuple(_workload(o, kind) for o in items)

    def list_pods(self, workload: Workload) -> tuple[Pod, ...]:
        """The pods the workload's selector matches (pods being deleted are left out)."""
        items, _ = self._list_all(f"list pods of {workload.key}", self._core.list_namespaced_pod,
                                  workload.namespace, label_selector=workload.selector or None)
        return tuple(_pod(o) for o in items if not (o.get("metadata") or {}).get("deletionTimestamp"))

    def list_hpas(self, namespace: str | None = None) -> tuple[HorizontalScaler, ...]:
        """Every autoscaling/v2 HorizontalPodAutoscaler (of a namespace or the cluster)."""
        if namespace:
            items, _ = self._list_all(f"list HPAs in {namespace}",
                                      self._hpa.list_namespaced_horizontal_pod_autoscaler, namespace)
        else:
            items, _ = self._list_all("list HPAs", self._hpa.list_horizontal_pod_autoscaler_for_all_namespaces)
        return tuple(_hpa(o) for o in items)

    def find_hpas(self, workload: Workload) -> tuple[HorizontalScaler, ...]:
        """The HPAs whose scaleTargetRef is this workload."""
        return tuple(h for h in self.list_hpas(workload.namespace)
                     if h.target_kind == workload.kind.value and h.target_name == workload.name)

    # ---------------------------------------------------------------- changing CPU
    def patch_cpu(
        self,
        workload: Workload,
        changes: Mapping[str, CpuChange],
        *,
        record_previous: bool = True,
        annotations: Mapping[str, str | None] | None = None,
        after_dry_run: Callable[[], None] | None = None,
    ) -> Workload:
        """Set the CPU request (and limit) of the named containers of the pod template.

        A dry run (``dryRun=All``) of the exact patch goes first; if the server refuses
        it (KubeInvalid — e.g. request > limit) nothing is sent for real. Then
        ``after_dry_run()`` is called (a last leadership check, a crash-test hook): if
        it raises, the real patch is not sent. The patch carries
        ``workload.resource_version``: if the workload changed since it was read →
        KubeConflict, nothing changed; re-read and recompute. ``annotations`` are set on
        the workload in the same patch (None deletes one). Returns the workload as
        stored after the patch. A template change starts a rollout."""
        if not changes:
            return workload
        body = cpu_patch_body(workload, changes, record_previous=record_previous, annotations=annotations)
        return self._dry_run_then_patch(workload, body, after_dry_run=after_dry_run)

    def annotate_workload(self, workload: Workload, annotations: Mapping[str, str | None]) -> Workload:
        """Set (or, with None, delete) annotations on the workload itself — a
        metadata-only strategic-merge patch: the pod template and the generation stay
        as they are, so nothing rolls. Carries ``workload.resource_version`` like
        ``patch_cpu`` (a stale read → KubeConflict). Used after in-place resizes to
        record the change time where a crash cannot lose it."""
        body: dict[str, Any] = {"metadata": {"resourceVersion": workload.resource_version,
                                             "annotations": dict(annotations)}}
        fn = self._api_of(workload.kind).patch
        stored = self._call(f"annotation patch of {workload.key}", fn, workload.name, workload.namespace, body,
                            field_manager=FIELD_MANAGER, _content_type=_STRATEGIC)
        return _workload(stored, workload.kind)

    def _dry_run_then_patch(
        self, workload: Workload, body: dict[str, Any], *, after_dry_run: Callable[[], None] | None = None
    ) -> Workload:
        fn = self._api_of(workload.kind).patch
        common = dict(field_manager=FIELD_MANAGER, _content_type=_STRATEGIC)
        self._call(f"dry-run patch of {workload.key}", fn, workload.name, workload.namespace, body,
                   dry_run="All", **common)
        if after_dry_run is not None:
            after_dry_run()
        stored = self._call(f"patch of {workload.key}", fn, workload.name, workload.namespace, body, **common)
        return _workload(stored, workload.kind)

    def revert(self, namespace: str, kind: WorkloadKind | str, name: str) -> Workload | None:
        """Put back the annotated previous CPU requests/limits and remove the annotation.
        Returns the stored workload, or None when there is nothing to revert. Containers
        that no longer exist are skipped. Conflicts are re-read and retried."""

        kind = kind if isinstance(kind, WorkloadKind) else WorkloadKind.parse(kind)

        def once() -> Workload | None:
            raw = self._call(f"read {kind.value} {namespace}/{name}", self._api_of(kind).read, name, namespace)
            wl = _workload(raw, kind)
            previous = wl.previous_requests
            if not previous:
                return None
            raw_containers = {c.get("name"): c for c in (((raw.get("spec") or {}).get("template") or {})
                                                         .get("spec") or {}).get("containers") or []}
            containers = []
            for cname, prev in sorted(previous.items()):
                if cname not in raw_containers:
                    log.warning("%s: container %s is gone; not reverted", wl.key, cname)
                    continue
                res = raw_containers[cname].get("resources") or {}
                containers.append({"name": cname, "resources": {
                    "requests": _revert_map(res.get("requests"), prev.cpu_request_m),
                    "limits": _revert_map(res.get("limits"), prev.cpu_limit_m),
                }})
            # the revert leaves no trace of ratefit: both of its annotations go
            body = {
                "metadata": {"resourceVersion": wl.resource_version,
                             "annotations": {PREVIOUS_REQUESTS_ANNOTATION: None, LAST_CHANGE_ANNOTATION: None}},
                "spec": {"template": {"spec": {"containers": containers}}},
            }
            return self._dry_run_then_patch(wl, body)

        return retry_on_conflict(once, attempts=self.retry.conflict_attempts)

    def resize_pods(
        self, pods: Iterable[Pod], changes: Mapping[str, CpuChange], *, dry_run_first: bool = True
    ) -> tuple[ResizeOutcome, ...]:
        """Resize running pods in place (``pods/{name}/resize``), one pod at a time, in
        the order given; one outcome per pod, in that order.

        With ``dry_run_first`` every pod's resize is first sent with ``dryRun=All``; if
        any is refused, no pod is resized (the refused one carries the server's reason,
        the others ``error_kind="Skipped"``) — so a value the server will not take never
        leaves the pods half-resized. Then the real resizes go one by one and stop at
        the first refusal (the rest ``Skipped``). A pod that vanished (404) is reported
        ``KubeNotFound`` and the next one tried. The template is not changed: new pods
        start at the template's value. Limits cannot be removed by a resize (Kubernetes
        docs, "Resize CPU and Memory Resources assigned to Containers")."""
        if any(c.drop_limit for c in changes.values()):
            raise InputError("an in-place resize cannot remove a CPU limit; use resizeBy Rollout for cpuLimit: Drop")
        pods = list(pods)
        body = {"spec": {"containers": [
            {"name": n, "resources": _resources_patch(ch)} for n, ch in changes.items()]}}

        def one(pod: Pod, *, dry: bool) -> ResizeOutcome:
            have = {c.name for c in pod.containers}
            missing = sorted(n for n in changes if n not in have)
            if missing:
                return ResizeOutcome(pod.name, False, error=f"pod has no container {missing}",
                                     error_kind="InputError")
            extra = {"dry_run": "All"} if dry else {}
            try:
                stored = self._call(f"{'dry-run ' if dry else ''}resize pod {pod.namespace}/{pod.name}",
                                    self._core.patch_namespaced_pod_resize, pod.name, pod.namespace, body,
                                    field_manager=FIELD_MANAGER, _content_type=_STRATEGIC, **extra)
            except KubeError as exc:
                return ResizeOutcome(pod.name, False, error=str(exc), error_kind=type(exc).__name__)
            return ResizeOutcome(pod.name, True, resource_version=(stored.get("metadata") or {}).get("resourceVersion"))

        def skipped(pod: Pod, why: str) -> ResizeOutcome:
            return ResizeOutcome(pod.name, False, error=why, error_kind="Skipped")

        gone: set[str] = set()
        if dry_run_first:
            for i, pod in enumerate(pods):
                trial = one(pod, dry=True)
                if trial.error_kind == "KubeNotFound":
                    gone.add(pod.name)
                elif not trial.ok:
                    why = f"not tried: the dry run of pod {pod.name} was refused"
                    return tuple(trial if j == i else skipped(p, why) for j, p in enumerate(pods))
        outcomes: list[ResizeOutcome] = []
        failed: str | None = None
        for pod in pods:
            if pod.name in gone:
                outcomes.append(ResizeOutcome(pod.name, False, error="pod vanished before the resize",
                                              error_kind="KubeNotFound"))
            elif failed is not None:
                outcomes.append(skipped(pod, f"not tried after pod {failed} was refused"))
            else:
                out = one(pod, dry=False)
                outcomes.append(out)
                if not out.ok and out.error_kind != "KubeNotFound":
                    failed = pod.name
        return tuple(outcomes)

    # ---------------------------------------------------------------- events
    def emit_event(
        self,
        *,
        regarding: ObjectRef,
        reason: str,
        note: str,
        action: str,
        type: EventType = EventType.NORMAL,
        related: ObjectRef | None = None,
    ) -> str:
        """Create an events.k8s.io/v1 Event in ``regarding``'s namespace and return its
        name. ``reason`` is UpperCamelCase (e.g. ``CpuRequestChanged``), ``action`` what
        we did or tried (e.g. ``Patch``, ``Propose``, ``Resize``)."""
        if not reason or not reason[0].isupper() or not reason.isalnum() or len(reason) > _SHORT_MAX:
            raise InputError(f"event reason {reason!r} must be UpperCamelCase letters/digits, ≤ 128 chars")
        if not action or len(action) > _SHORT_MAX:
            raise InputError(f"event action {action!r} must be 1–128 characters")
        now = self._clock()
        # like client-go's events: "<object name>.<unique hex suffix>" (≤ 253 chars, DNS subdomain)
        name = f"{regarding.name[:220].rstrip('.-')}.{int(now * 1e9):x}{uuid.uuid4().hex[:4]}"
        body: dict[str, Any] = {
            "apiVersion": "events.k8s.io/v1",
            "kind": "Event",
            "metadata": {"name": name, "namespace": regarding.namespace},
            "eventTime": micro_time(now),
            "reportingController": REPORTING_CONTROLLER,
            "reportingInstance": self.identity[:_SHORT_MAX],
            "action": action,
            "reason": reason,
            "note": note if len(note.encode()) <= _NOTE_MAX else note.encode()[: _NOTE_MAX - 3].decode("utf-8", "ignore") + "...",
            "type": EventType(type).value,
            "regarding": _ref(regarding),
        }
        if related is not None:
            body["related"] = _ref(related)
        self._call(f"create event for {regarding.kind} {regarding.namespace}/{regarding.name}",
                   self._events.create_namespaced_event, regarding.namespace, body)
        return name


# -------------------------------------------------------------------- workload kinds
@dataclass(frozen=True)
class _WorkloadApi:
    """The apps/v1 calls for one workload kind (bound to the adapter's AppsV1Api)."""

    read: Callable[..., Any]
    list_namespaced: Callable[..., Any]
    list_all: Callable[..., Any]
    patch: Callable[..., Any]


#: workload kind → the names of its AppsV1Api calls: read, list in a namespace, list in
#: all namespaces, patch (looked up on each call, so a test may wrap one of them)
WORKLOAD_CALLS: dict[WorkloadKind, tuple[str, str, str, str]] = {
    WorkloadKind.DEPLOYMENT: ("read_namespaced_deployment", "list_namespaced_deployment",
                              "list_deployment_for_all_namespaces", "patch_namespaced_deployment"),
    WorkloadKind.STATEFULSET: ("read_namespaced_stateful_set", "list_namespaced_stateful_set",
                               "list_stateful_set_for_all_namespaces", "patch_namespaced_stateful_set"),
}


# -------------------------------------------------------------------- patch bodies
def cpu_patch_body(
    workload: Workload,
    changes: Mapping[str, CpuChange],
    *,
    record_previous: bool = True,
    annotations: Mapping[str, str | None] | None = None,
) -> dict[str, Any]:
    """The strategic-merge patch ``patch_cpu`` sends (pure; shown by reviews and tests):
    per changed container only ``name`` (the merge key), ``resources.requests.cpu`` and,
    when it changes, ``resources.limits.cpu`` (null: remove it); ``metadata.resourceVersion``
    (the precondition) and the annotations. Raises InputError for an unknown container."""
    containers = []
    for name, change in changes.items():
        workload.container(name)  # raises InputError for an unknown container
        containers.append({"name": name, "resources": _resources_patch(change)})
    meta: dict[str, Any] = {"resourceVersion": workload.resource_version}
    if record_previous:
        previous = dict(workload.previous_requests)
        for name in changes:
            if name not in previous:
                c = workload.container(name)
                previous[name] = PreviousRequest(c.cpu_request_m, c.cpu_limit_m)
        meta["annotations"] = {PREVIOUS_REQUESTS_ANNOTATION: encode_previous_requests(previous)}
    if annotations:
        meta.setdefault("annotations", {}).update(annotations)
    return {"metadata": meta, "spec": {"template": {"spec": {"containers": containers}}}}


# -------------------------------------------------------------------- JSON → values
def _revert_map(current: Mapping[str, Any] | None, previous_m: int | None) -> dict[str, Any] | None:
    """The strategic-merge value that puts one ``requests``/``limits`` map back: the CPU
    set to its previous value, or removed — and the whole map removed (None) when CPU was
    its only key, so a revert never leaves an empty ``requests: {}``/``limits: {}``."""
    if previous_m is not None:
        return {"cpu": format_cpu(previous_m)}
    if not set(current or {}) - {"cpu"}:
        return None
    return {"cpu": None}


def _ref(ref: ObjectRef) -> dict[str, str]:
    out = {"apiVersion": ref.api_version, "kind": ref.kind, "namespace": ref.namespace, "name": ref.name}
    if ref.uid:
        out["uid"] = ref.uid
    return out


def _resources_patch(change: CpuChange) -> dict[str, Any]:
    res: dict[str, Any] = {"requests": {"cpu": format_cpu(change.request_m)}}
    if change.drop_limit:
        res["limits"] = {"cpu": None}  # strategic merge: null deletes the key
    elif change.limit_m is not None:
        res["limits"] = {"cpu": format_cpu(change.limit_m)}
    return res


def _cpu(res: Mapping[str, Any] | None, key: str, where: str) -> int | None:
    value = ((res or {}).get(key) or {}).get("cpu")
    return None if value is None else parse_cpu(value, field=where)


def _mem(res: Mapping[str, Any] | None, key: str) -> str | None:
    value = ((res or {}).get(key) or {}).get("memory")
    return None if value is None else str(value)


def _selector(sel: Mapping[str, Any] | None) -> str:
    """A LabelSelector rendered in the label-selector query syntax (Kubernetes docs,
    "Labels and Selectors": ``k=v``, ``k in (a,b)``, ``k notin (a,b)``, ``k``, ``!k``)."""
    sel = sel or {}
    parts = [f"{k}={v}" for k, v in sorted((sel.get("matchLabels") or {}).items())]
    for expr in sel.get("matchExpressions") or []:
        key, op, values = expr.get("key"), expr.get("operator"), expr.get("values") or []
        if op == "In":
            parts.append(f"{key} in ({','.join(values)})")
        elif op == "NotIn":
            parts.append(f"{key} notin ({','.join(values)})")
        elif op == "Exists":
            parts.append(str(key))
        elif op == "DoesNotExist":
            parts.append(f"!{key}")
    return ",".join(parts)


def _workload(obj: Mapping[str, Any], kind: WorkloadKind) -> Workload:
    meta = obj.get("metadata") or {}
    spec = obj.get("spec") or {}
    status = obj.get("status") or {}
    key = f"{meta.get('namespace')}/{kind.value}/{meta.get('name')}"
    containers = []
    for c in ((spec.get("template") or {}).get("spec") or {}).get("containers") or []:
        res = c.get("resources") or {}
        where = f"{key} container {c.get('name')}"
        containers.append(ContainerResources(
            name=c["name"],
            cpu_request_m=_cpu(res, "requests", f"{where} requests.cpu"),
            cpu_limit_m=_cpu(res, "limits", f"{where} limits.cpu"),
            mem_request=_mem(res, "requests"),
            mem_limit=_mem(res, "limits"),
            image=c.get("image") if isinstance(c.get("image"), str) else None,
        ))
    generation = int(meta.get("generation") or 0)
    replicas = int(spec.get("replicas", 1) if spec.get("replicas") is not None else 1)
    updated = int(status.get("updatedReplicas") or 0)
    rollout = (
        int(status.get("observedGeneration") or 0) < generation
        or updated < replicas
        or int(status.get("replicas") or 0) > updated
    )
    return Workload(
        namespace=meta.get("namespace") or "",
        kind=kind,
        name=meta.get("name") or "",
        uid=meta.get("uid") or "",
        generation=generation,
        resource_version=str(meta.get("resourceVersion") or ""),
        replicas=replicas,
        selector=_selector(spec.get("selector")),
        annotations=dict(meta.get("annotations") or {}),
        containers=tuple(containers),
        rollout_in_progress=rollout,
    )


def _pod(obj: Mapping[str, Any]) -> Pod:
    meta = obj.get("metadata") or {}
    spec = obj.get("spec") or {}
    status = obj.get("status") or {}
    where = f"pod {meta.get('namespace')}/{meta.get('name')}"
    actual = {s.get("name"): s.get("resources") for s in status.get("containerStatuses") or [] if s.get("resources")}
    containers = []
    for c in spec.get("containers") or []:
        res = c.get("resources") or {}
        sreq, slim = _cpu(res, "requests", f"{where} requests.cpu"), _cpu(res, "limits", f"{where} limits.cpu")
        act = actual.get(c["name"])
        if act is not None:
            areq, alim = _cpu(act, "requests", f"{where} status requests.cpu"), _cpu(act, "limits", f"{where} status limits.cpu")
        else:
            areq, alim = sreq, slim
        containers.append(PodContainer(c["name"], areq, alim, sreq, slim))
    conditions = {
        c.get("type"): c.get("reason") or c.get("status") or ""
        for c in status.get("conditions") or []
        if c.get("type") in ("PodResizePending", "PodResizeInProgress") and c.get("status") != "False"
    }
    return Pod(
        namespace=meta.get("namespace") or "",
        name=meta.get("name") or "",
        uid=meta.get("uid") or "",
        resource_version=str(meta.get("resourceVersion") or ""),
        phase=status.get("phase") or "Unknown",
        containers=tuple(containers),
        resize_conditions=conditions,
    )


def _scales_on_cpu_utilization(spec: Mapping[str, Any]) -> bool:
    metrics = spec.get("metrics")
    if not metrics:
        # autoscaling/v2 API reference, HorizontalPodAutoscalerSpec.metrics: "If not set,
        # the default metric will be set to 80% average CPU utilization."
        return True
    for m in metrics if isinstance(metrics, list) else ():
        if not isinstance(m, Mapping):
            continue
        if m.get("type") == "Resource":
            src = m.get("resource") or {}
        elif m.get("type") == "ContainerResource":
            src = m.get("containerResource") or {}
        else:
            continue
        if isinstance(src, Mapping) and src.get("name") == "cpu" and isinstance(src.get("target"), Mapping) \
                and src["target"].get("type") == "Utilization":
            return True
    return False


#: spec.metrics[].type → the field holding that metric's source (autoscaling/v2 API reference)
_METRIC_FIELDS = {"Resource": "resource", "ContainerResource": "containerResource", "Pods": "pods",
                  "Object": "object", "External": "external"}


def _number(v: Any) -> float | None:
    """A quantity (``"100"``, ``"500m"``, ``1.5``) as a float; None when absent or malformed
    (one odd metric never hides the autoscaler's other fields)."""
    if v is None:
        return None
    try:
        return parse_cpu(v, field="metric target") / 1000.0
    except InputError:
        return None


def _whole(v: Any) -> int | None:
    return v if isinstance(v, int) and not isinstance(v, bool) and v >= 0 else None


def _scaler_metrics(spec: Mapping[str, Any]) -> tuple[ScalerMetric, ...]:
    metrics = spec.get("metrics")
    if not metrics:
        # the API's default (see _scales_on_cpu_utilization): 80 % average CPU utilisation
        return (ScalerMetric("Resource", "cpu", "Utilization", utilization=80.0),)
    out = []
    for m in metrics if isinstance(metrics, list) else ():
        if not isinstance(m, Mapping) or m.get("type") not in _METRIC_FIELDS:
            continue
        src = m.get(_METRIC_FIELDS[m["type"]]) or {}
        if not isinstance(src, Mapping):
            continue
        target = src.get("target") or {}
        if m["type"] in ("Resource", "ContainerResource"):
            name = src.get("name")
        else:  # Pods/Object/External name their metric in .metric.name
            name = (src.get("metric") or {}).get("name") if isinstance(src.get("metric"), Mapping) else None
        if not isinstance(name, str) or not isinstance(target, Mapping):
            continue
        util = target.get("averageUtilization")
        out.append(ScalerMetric(
            source=m["type"], name=name, target_type=str(target.get("type") or ""),
            average_value=_number(target.get("averageValue")), value=_number(target.get("value")),
            utilization=float(util) if _whole(util) is not None else None,
            container=src.get("container") if isinstance(src.get("container"), str) else None,
        ))
    return tuple(out)


def _behavior(spec: Mapping[str, Any], direction: str) -> Mapping[str, Any]:
    """``spec.behavior.scaleUp`` / ``scaleDown`` of an HPA, {} when absent or malformed."""
    behavior = spec.get("behavior")
    rules = behavior.get(direction) if isinstance(behavior, Mapping) else None
    return rules if isinstance(rules, Mapping) else {}


def _scale_up_tolerance(spec: Mapping[str, Any]) -> float:
    tol = _number(_behavior(spec, "scaleUp").get("tolerance"))
    return tol if tol is not None else 0.1  # Kubernetes docs: the default tolerance 0.1


def _scale_down_window(spec: Mapping[str, Any]) -> float:
    w = _whole(_behavior(spec, "scaleDown").get("stabilizationWindowSeconds"))
    # autoscaling/v2 API reference: 0..3600, default 300 for scale down
    return float(w) if w is not None and 0 <= w <= MAX_STABILIZATION_WINDOW_S else DEFAULT_SCALE_DOWN_WINDOW_S


def _hpa(obj: Mapping[str, Any]) -> HorizontalScaler:
    meta = obj.get("metadata") or {}
    spec = obj.get("spec") or {}
    target = spec.get("scaleTargetRef") or {}
    status = obj.get("status") or {}
    return HorizontalScaler(
        namespace=meta.get("namespace") or "",
        name=meta.get("name") or "",
        target_kind=target.get("kind") or "",
        target_name=target.get("name") or "",
        scales_on_cpu_utilization=_scales_on_cpu_utilization(spec),
        metrics=_scaler_metrics(spec),
        min_replicas=_whole(spec.get("minReplicas")),
        max_replicas=_whole(spec.get("maxReplicas")),
        current_replicas=_whole(status.get("currentReplicas")) if isinstance(status, Mapping) else None,
        tolerance=_scale_up_tolerance(spec),
        scale_down_window_s=_scale_down_window(spec),
    )


def _policy(obj: Mapping[str, Any]) -> PolicyObject:
    meta = obj.get("metadata") or {}
    return PolicyObject(
        namespace=meta.get("namespace") or "",
        name=meta.get("name") or "",
        uid=meta.get("uid") or "",
        generation=int(meta.get("generation") or 0),
        resource_version=str(meta.get("resourceVersion") or ""),
        spec=obj.get("spec") or {},
        status=obj.get("status") or {},
        created=str(meta.get("creationTimestamp") or ""),
    )


#: The JSON → value converters under public names, for the watch-fed cache
#: (``controller/kube_cache.py``), which stores exactly what the reads above return.
workload_from_json = _workload
pod_from_json = _pod
hpa_from_json = _hpa
policy_from_json = _policy
selector_text = _selector
