"""One reconcile pass over every SizingPolicy: gather → decide → act.

**Gather** (all reads first, batched): list the policies (one LIST per namespace, or
one cluster-wide), parse each (an invalid one is written a ``Ready=False`` condition
that says what is wrong and is never acted on); LIST the Deployments, StatefulSets
and HorizontalPodAutoscalers once per namespace that has policies (never a GET per
policy); ask the metrics source for every container's per-pod rates in one grouped
query; ask the sizing API for every (model, rate) in one batch call.

**Decide** with the pure functions of ``controller/decide`` (one
:class:`~ratefit.controller.decide.WorkloadDecision` per policy); the global budget
(changes per minute, concurrent rollouts — ``controller/limits.Budget``) is shared by
the whole pass and taken once per changed workload.

**Act**, per policy, in a fixed order (namespace, name): in apply mode a server-side
dry run of the change, then one strategic-merge patch of the workload's pod template
(every changed container of the workload in that one patch, so a workload is never
half-changed), or with ``method: in-place`` the pods' ``resize`` subresource one pod
at a time; the previous requests are recorded by the adapter in the
``ratefit.dev/previous-requests`` annotation in the same patch. Then the status
(conditions merged by type, proposals, lastChange, settling) through the status
subresource — written only when it differs from what is stored — a Kubernetes Event
per new change or proposal, one JSON log line per container whose decision changed,
and the metrics.

Level-based and idempotent: every pass recomputes from what it observes. On an
unchanged world a second pass writes nothing (no patch, no status write, no event).
A 409 on the patch → re-read the workload, recompute, retry (bounded). 429/5xx (after
the adapter's own retries) → the workload is held this pass and backs off
(``limits.ExponentialBackoff``); it is retried once its delay has passed.

Crash safety: the change and its record travel together — the adapter writes the
previous-requests annotation in the same patch as the new requests. If the process
dies after the patch but before the status write, the next pass sees the workload
already at the proposed value, so the change is not made twice; the cooldown is then
recovered from the annotation ``ratefit.dev/last-change`` written in the same patch
(for ``method: in-place``, in a metadata-only patch of the workload right after the
pods' resizes — nothing rolls).

Test hook: ``crash_hook(point)`` is called at the points ``after-dry-run``,
``after-patch`` and ``after-status`` (per workload). ``ratefit run`` wires it to the
environment variable ``RATEFIT_CRASH_AT=<point>:<n>`` (kill the process with SIGKILL
at the n-th time the point is reached), used by ``tests/test_faults_crash.py``.
"""

from __future__ import annotations

import gc
import json
import logging
import math
import threading
import time
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from datetime import datetime, timezone
from enum import StrEnum
from typing import Any, Protocol

from ratefit.controller.decide import (
    ContainerInput,
    Decision,
    Sizing,
    Verdict,
    WorkloadDecision,
    Why,
    decide_workload,
)
from ratefit.controller.errors import KubeConflict, KubeError, KubeInvalid, KubeNotFound
from ratefit.controller.limits import Budget, BudgetView, ExponentialBackoff
from ratefit.controller.metrics_source import RateRequest, RateResult
from ratefit.controller.policy import (
    CONDITION_READY,
    format_duration,
    GROUP,
    KIND,
    VERSION,
    Method,
    Mode,
    Policy,
    PolicyInvalid,
    format_time,
    history_from_status,
    history_to_status,
    invalid_condition,
    make_condition,
    parse_policy,
    parse_time,
    set_condition,
)
from ratefit.controller.review import ReviewRow
from ratefit.controller.telemetry import CpuSample, Telemetry
from ratefit.models.errors import RatefitError

__all__ = [
    "LAST_CHANGE_ANNOTATION",
    "PassOutcome",
    "PassResult",
    "ReconcileConfig",
    "Reconciler",
    "crash_hook_from_env",
    "policy_object_dict",
    "shard_of",
]

log = logging.getLogger("ratefit.controller.reconcile")
#: decisions go to their own logger as one JSON object per line
decision_log = logging.getLogger("ratefit.decisions")

#: Annotation written in the same patch as a change: when ratefit changed the workload.
LAST_CHANGE_ANNOTATION = "ratefit.dev/last-change"
REPORTING_CONTROLLER = "ratefit.dev/controller"

CRASH_POINTS = ("after-dry-run", "after-patch", "after-status")
#: up to this many namespaces with policies, workloads are listed per namespace
LIST_PER_NAMESPACE_UP_TO = 3


class PassOutcome(StrEnum):
    """What one pass came to (one value per pass; the loop and the metric read it)."""

    DONE = "done"  # every policy decided and acted on
    DEGRADED = "degraded"  # done, but some inputs or writes failed (held, retried next pass)
    ABANDONED = "abandoned"  # stopped early (SIGTERM or lost the Lease); the rest is left as it was
    FAILED = "failed"  # could not even list the policies; nothing was done


@dataclass(frozen=True)
class PassResult:
    """The one outcome type of a pass."""

    outcome: PassOutcome
    rows: tuple[ReviewRow, ...] = ()
    policies: int = 0
    invalid: int = 0
    #: workload keys (namespace/Kind/name) changed in the cluster this pass
    patched: tuple[str, ...] = ()
    status_writes: int = 0
    events: int = 0
    errors: tuple[str, ...] = ()
    duration_s: float = 0.0
    #: seconds until the loop should run again (None: its interval)
    requeue_after: float | None = None
    #: wall time spent in each phase (seconds): gather, decide, act
    phases: Mapping[str, float] = field(default_factory=dict)


class KubePort(Protocol):
    """What a pass needs from the Kubernetes adapter (``controller/kube.KubeAdapter``)."""

    def list_policies(self, namespaces: Sequence[str] | None = None) -> Any: ...
    def list_workloads(self, kind: Any, *, namespace: str | None = None) -> Any: ...
    def read_workload(self, namespace: str, kind: Any, name: str) -> Any: ...
    def list_hpas(self, namespace: str | None = None) -> Any: ...
    def list_pods(self, workload: Any) -> Any: ...
    def patch_cpu(self, workload: Any, changes: Mapping[str, Any], *, annotations: Mapping[str, str] | None = None,
                  after_dry_run: Callable[[], None] | None = None) -> Any: ...
    def resize_pods(self, pods: Iterable[Any], changes: Mapping[str, Any]) -> Any: ...
    def annotate_workload(self, workload: Any, annotations: Mapping[str, str | None]) -> Any: ...
    def write_policy_status(self, namespace: str, name: str, status: Mapping[str, Any], *,
                            resource_version: str | None = None) -> Any: ...
    def emit_event(self, **kwargs: Any) -> Any: ...


class SizingPort(Protocol):
    """What a pass needs from the sizing API client (``controller/sizing_client``)."""

    def demand_batch(self, items: Sequence[tuple[str, float]]) -> Sequence[Any]: ...


@dataclass(frozen=True)
class ReconcileConfig:
    #: force dry-run for every policy (``ratefit run --dry-run``, ``ratefit plan``)
    dry_run: bool = False
    #: False: read only — no status, no events, no patches (``ratefit plan``)
    write: bool = True
    #: namespaces to watch (empty: all)
    namespaces: tuple[str, ...] = ()
    #: this replica's name, in the pass log line (Events carry the adapter's identity)
    identity: str = "ratefit"
    #: re-read/recompute/retry rounds after a 409 on a patch
    conflict_attempts: int = 3
    #: (index, count): act only on policies whose namespace hashes to this shard
    #: (DESIGN.md "Scale path"; each shard runs its own replicas and its own Lease)
    shard: tuple[int, int] | None = None


def shard_of(namespace: str, count: int) -> int:
    """The shard (0 … count−1) of a namespace: CRC-32 of its name (stable across
    processes and versions, unlike Python's ``hash``) modulo ``count``."""
    import zlib

    return zlib.crc32(namespace.encode("utf-8")) % count


def crash_hook_from_env(value: str | None) -> Callable[[str], None] | None:
    """``RATEFIT_CRASH_AT=after-dry-run:1`` → a hook that SIGKILLs this process the
    first time the pass reaches ``after-dry-run``. A TEST HOOK for the crash fault
    tests; never set it in production."""
    if not value:
        return None
    point, _, nth = value.partition(":")
    if point not in CRASH_POINTS:
        raise RatefitError(f"RATEFIT_CRASH_AT={value!r}: point must be one of {', '.join(CRASH_POINTS)}")
    n = int(nth or "1")
    seen = {"n": 0}

    def hook(at: str) -> None:
        if at != point:
            return
        seen["n"] += 1
        if seen["n"] >= n:
            import os
            import signal
            import sys

            print(f"ratefit: RATEFIT_CRASH_AT={value}: killing myself at {at}", file=sys.stderr, flush=True)
            os.kill(os.getpid(), signal.SIGKILL)

    return hook


# ---------------------------------------------------------------- helpers on plain values


def policy_object_dict(obj: Any) -> dict[str, Any]:
    """A stored SizingPolicy (``workload.PolicyObject``) as the object ``parse_policy`` reads."""
    return {
        "apiVersion": f"{GROUP}/{VERSION}",
        "kind": KIND,
        "metadata": {"namespace": obj.namespace, "name": obj.name, "generation": obj.generation},
        "spec": dict(obj.spec or {}),
    }


def _kind_value(kind: Any) -> str:
    return getattr(kind, "value", kind)


def _comparable(status: Mapping[str, Any]) -> dict[str, Any]:
    """Status as comparable plain data: None values dropped (the server prunes them, and
    the merge patch deletes them), and without what only ages — the proposals' free-text
    messages such as "1234s of 7200s settle" — so a pass with only newer wording writes
    nothing. The status is shallow (lists of flat objects), so one level of lists is enough."""
    out: dict[str, Any] = {}
    for k, v in status.items():
        if v is None:
            continue
        if isinstance(v, list):
            drop = "message" if k == "proposals" else None
            v = [{kk: vv for kk, vv in item.items() if vv is not None and kk != drop} if isinstance(item, Mapping)
                 else item for item in v]
        out[k] = v
    return out


def _sizing_of(answer: Any) -> Sizing | None:
    """One item of the sizing API's batch answer → Sizing (cores), or None."""
    if answer is None:
        return None
    if isinstance(answer, Sizing):
        return answer
    get = answer.get if isinstance(answer, Mapping) else (lambda k, d=None: getattr(answer, k, d))
    if get("error"):
        return None
    cpu_m, upper_m = get("cpu_m"), get("upper_m")
    if cpu_m is None or upper_m is None:
        return None
    return Sizing(demand=float(cpu_m) / 1000.0, upper=float(upper_m) / 1000.0, extrapolated=bool(get("extrapolated", False)))


def _m(cores: float | None) -> int | None:
    return None if cores is None else int(math.ceil(round(cores * 1000.0, 6)))


# ---------------------------------------------------------------- the pass


@dataclass
class _Entry:
    obj: Any  # workload.PolicyObject
    policy: Policy | None = None
    invalid: PolicyInvalid | None = None
    workload: Any = None  # workload.Workload
    hpa_on_cpu: bool = False
    inputs: list[ContainerInput] = field(default_factory=list)
    decision: WorkloadDecision | None = None
    problem: str | None = None  # why nothing could be decided (workload missing …)
    pods: tuple[Any, ...] | None = None  # method in-place: the workload's pods, as listed this pass


class Reconciler:
    """Runs passes. Holds what must live across passes in one process (the budget's
    token bucket, the per-workload backoff); everything else is re-read each pass."""

    def __init__(
        self,
        *,
        kube: Any,
        rates: Any,
        sizing: Any,
        config: ReconcileConfig = ReconcileConfig(),
        budget: Budget | None = None,
        backoff: ExponentialBackoff | None = None,
        telemetry: Telemetry | None = None,
        wall_clock: Callable[[], datetime] = lambda: datetime.now(timezone.utc),
        monotonic: Callable[[], float] = time.monotonic,
        crash_hook: Callable[[str], None] | None = None,
    ) -> None:
        self.kube = kube
        self.rates = rates
        self.sizing = sizing
        self.config = config
        self.budget = budget or Budget()
        self.backoff = backoff
        self.telemetry = telemetry or Telemetry()
        self._now = wall_clock
        self._mono = monotonic
        self._hook = crash_hook or (lambda point: None)
        self._retry_at: dict[str, float] = {}
        self._budget_seeded = False
        self._gather_split: dict[str, float] = {}
        self._parsed: dict[tuple[str, str, str, int], Policy | PolicyInvalid] = {}

    # -- public -----------------------------------------------------------------
    def run_pass(self, control: Any = None) -> PassResult:
        """One pass. ``control`` (``loop.PassControl``) may say stop / not leader.

        The cyclic garbage collector is paused for the pass: a pass over thousands of
        policies allocates many short-lived objects and full collections would run over
        all of them repeatedly; the few cycles it leaves are collected afterwards."""
        was_enabled = gc.isenabled()
        gc.disable()
        try:
            return self._run_pass(control)
        finally:
            if was_enabled:
                gc.enable()

    def _run_pass(self, control: Any) -> PassResult:
        should_stop = getattr(control, "should_stop", None) or (lambda: False)
        may_act = getattr(control, "may_act", None) or (lambda: True)
        t0, c0 = self._mono(), time.process_time()
        now = self._now()
        errors: list[str] = []
        phases: dict[str, float] = {}
        try:
            entries = self._gather(now, errors)
        except KubeError as exc:
            self.telemetry.kube_errors.labels(kind=type(exc).__name__).inc()
            log.error("pass failed: cannot list SizingPolicies: %s", exc)
            return self._finish(PassResult(outcome=PassOutcome.FAILED, errors=(str(exc),)), t0, phases)
        t1, c1 = self._mono(), time.process_time()
        self._decide_all(entries, now)
        t2, c2 = self._mono(), time.process_time()
        result = self._act_all(entries, now, errors, should_stop=should_stop, may_act=may_act)
        t3, c3 = self._mono(), time.process_time()
        # wall and CPU seconds per phase (CPU: this process, all threads) — for the benchmark
        phases.update(self._gather_split)
        phases.update(gather=t1 - t0, decide=t2 - t1, act=t3 - t2,
                      gather_cpu=c1 - c0, decide_cpu=c2 - c1, act_cpu=c3 - c2)
        return self._finish(result, t0, phases)

    # -- gather -------------------------------------------------------------------
    def _gather(self, now: datetime, errors: list[str]) -> list[_Entry]:
        t_g0 = time.perf_counter()
        objs = list(self.kube.list_policies(list(self.config.namespaces) or None).items)
        if self.config.shard is not None:
            index, count = self.config.shard
            objs = [o for o in objs if shard_of(o.namespace, count) == index]
        entries = [_Entry(obj=o) for o in sorted(objs, key=lambda o: (o.namespace, o.name))]
        window_texts: dict[float, str] = {}

        def window_text(seconds: float) -> str:
            if seconds not in window_texts:
                window_texts[seconds] = format_duration(seconds)
            return window_texts[seconds]

        cache: dict[tuple[str, str, str, int], Policy | PolicyInvalid] = {}
        for e in entries:
            # the spec only changes with the generation: parse each (uid, generation) once
            ck = (e.obj.namespace, e.obj.name, e.obj.uid, e.obj.generation)
            got = self._parsed.get(ck)
            if got is None:
                try:
                    got = parse_policy(policy_object_dict(e.obj))
                except PolicyInvalid as exc:
                    got = exc
            cache[ck] = got
            if isinstance(got, PolicyInvalid):
                e.invalid = got
            else:
                e.policy = got
        self._parsed = cache  # forget policies that are gone
        valid = [e for e in entries if e.policy is not None]
        self.telemetry.policies.labels(state="valid").set(len(valid))
        self.telemetry.policies.labels(state="invalid").set(len(entries) - len(valid))

        # the rates depend only on the policies: ask Prometheus while the workloads are listed
        requests: list[RateRequest] = []
        models: dict[tuple[str, str, str], str] = {}
        for e in valid:
            p = e.policy
            for c in p.containers:
                requests.append(
                    RateRequest(
                        namespace=p.namespace, policy=p.name, workload=p.workload_name, container=c.name,
                        query=c.rate_query, rate_window=window_text(p.rate_window_s),
                        percentile=p.rate_percentile,
                    )
                )
                models[(p.namespace, p.name, c.name)] = c.model
        rate_box: dict[str, Any] = {}

        def ask_rates() -> None:
            t = time.perf_counter()
            try:
                rate_box["rates"] = self._query_rates(requests, errors)
            except BaseException as exc:  # handed to the pass's thread below
                rate_box["error"] = exc
            rate_box["seconds"] = time.perf_counter() - t

        rate_thread = threading.Thread(target=ask_rates, name="ratefit-rates", daemon=True)
        rate_thread.start()

        # one LIST of workloads and of HPAs per namespace that has policies
        workloads: dict[tuple[str, str, str], Any] = {}
        hpa_cpu: set[tuple[str, str, str]] = set()
        rolling: list[str] = []
        policy_ns = sorted({e.policy.namespace for e in valid})
        kinds = sorted({e.policy.workload_kind for e in valid})
        # many namespaces: one paged cluster-wide LIST per kind beats one LIST per namespace
        scopes: list[str | None] = [None] if (len(policy_ns) > LIST_PER_NAMESPACE_UP_TO and not self.config.namespaces) else list(policy_ns)
        wanted = set(policy_ns)
        for ns in scopes:
            where = ns or "all namespaces"
            for kind in kinds:
                try:
                    for w in self.kube.list_workloads(kind, namespace=ns):
                        if w.namespace not in wanted:
                            continue
                        workloads[(w.namespace, _kind_value(w.kind), w.name)] = w
                        if w.rollout_in_progress:
                            rolling.append(w.key)
                except KubeError as exc:
                    self.telemetry.kube_errors.labels(kind=type(exc).__name__).inc()
                    errors.append(f"list {kind}s in {where}: {exc}")
            try:
                for h in self.kube.list_hpas(ns):
                    if h.scales_on_cpu_utilization:
                        hpa_cpu.add((h.namespace, h.target_kind, h.target_name))
            except KubeError as exc:
                self.telemetry.kube_errors.labels(kind=type(exc).__name__).inc()
                errors.append(f"list horizontal autoscalers in {where}: {exc}")
        if self.budget.slots is not None:
            self.budget.slots.sync(rolling)  # level-based: the cluster says what is rolling

        found: set[tuple[str, str]] = set()
        for e in valid:
            p = e.policy
            w = workloads.get((p.namespace, p.workload_kind, p.workload_name))
            if w is None:
                e.problem = f"{p.workload_key} not found"
                continue
            e.workload = w
            e.hpa_on_cpu = (p.namespace, p.workload_kind, p.workload_name) in hpa_cpu
            found.add((p.namespace, p.name))
        t_lists = time.perf_counter()
        rate_thread.join()
        if "error" in rate_box:
            raise rate_box["error"]
        rates = rate_box["rates"]
        t_rates = time.perf_counter()
        asked = [r for r in requests if (r.namespace, r.policy) in found]
        sizing = self._query_sizing(asked, models, rates, errors)
        t_sizing = time.perf_counter()
        self._gather_split = {"gather_kube": t_lists - t_g0, "gather_rates": rate_box.get("seconds", 0.0),
                              "gather_rates_wait": t_rates - t_lists, "gather_sizing": t_sizing - t_rates}
        for e in valid:
            if e.workload is None:
                continue
            by_name = {c.name: c for c in e.workload.containers}
            running = self._running_values(e, errors) if e.policy.method is Method.IN_PLACE else {}
            for c in e.policy.containers:
                wc = by_name.get(c.name)
                if wc is None:
                    continue  # decide holds it NoMetrics with a message naming the container
                current_req, current_lim = running.get(c.name, (wc.cpu_request_m, wc.cpu_limit_m))
                e.inputs.append(
                    ContainerInput(
                        name=c.name,
                        request_m=current_req,
                        limit_m=current_lim,
                        rate=rates.get(f"{e.policy.key}/{c.name}"),
                        sizing=sizing.get(f"{e.policy.key}/{c.name}"),
                    )
                )
        return entries

    def _running_values(self, e: _Entry, errors: list[str]) -> dict[str, tuple[int | None, int | None]]:
        """``method: in-place``: what the pods run (their spec after resizes), per container —
        the value most pods agree on. The template keeps the old value, so deciding from it
        would propose the same resize every pass."""
        try:
            e.pods = tuple(self.kube.list_pods(e.workload))
        except KubeError as exc:
            self.telemetry.kube_errors.labels(kind=type(exc).__name__).inc()
            errors.append(f"list pods of {e.policy.workload_key}: {exc}")
            e.pods = ()
            return {}
        out: dict[str, tuple[int | None, int | None]] = {}
        for c in e.policy.containers:
            seen: dict[tuple[int | None, int | None], int] = {}
            for pod in e.pods:
                for pc in pod.containers:
                    if pc.name == c.name:
                        v = (pc.spec_cpu_request_m, pc.spec_cpu_limit_m)
                        seen[v] = seen.get(v, 0) + 1
            if seen:
                out[c.name] = max(sorted(seen, key=lambda v: (v[0] or 0, v[1] or 0)), key=lambda v: seen[v])
        return out

    def _query_rates(self, requests: Sequence[RateRequest], errors: list[str]) -> dict[str, float | None]:
        """key ``namespace/policy/container`` → the rate (req/s per pod), None: NoMetrics."""
        if not requests:
            return {}
        try:
            got: Mapping[str, RateResult] = self.rates.per_pod_rates(requests)
        except RatefitError as exc:  # a source that raises instead of answering NoMetrics
            got = {}
            self.telemetry.rate_query_errors.labels(kind=type(exc).__name__).inc()
            errors.append(f"rates: {exc}")
        out: dict[str, float | None] = {}
        missing = 0
        first_message = ""
        for r in requests:
            res = got.get(r.key)
            v = None if res is None else res.rate
            ok = v is not None and math.isfinite(v) and v >= 0
            out[r.key] = float(v) if ok else None
            if not ok:
                missing += 1
                first_message = first_message or (res.message if res is not None else "no answer")
        if missing:
            self.telemetry.rate_query_errors.labels(kind="NoMetrics").inc(missing)
            errors.append(f"rates: {missing} of {len(requests)} containers without a usable rate ({first_message})")
            log.warning("%d containers without a usable rate; held with NoMetrics: %s", missing, first_message)
        return out

    def _query_sizing(
        self, requests: Sequence[RateRequest], models: Mapping[tuple[str, str, str], str],
        rates: Mapping[str, float | None], errors: list[str],
    ) -> dict[str, Sizing | None]:
        asked = [r for r in requests if rates.get(r.key) is not None]
        if not asked:
            return {}
        items = [(models[(r.namespace, r.policy, r.container)], float(rates[r.key])) for r in asked]
        try:
            answers = self.sizing.demand_batch(items)
        except RatefitError as exc:  # sizing API down: every container NoModel
            self.telemetry.api_errors.labels(kind=type(exc).__name__).inc()
            errors.append(f"sizing API: {exc}")
            log.warning("sizing API failed; holding every container with NoModel: %s", exc)
            return {}
        if len(answers) != len(asked):
            errors.append(f"sizing API answered {len(answers)} items for {len(asked)} asked")
            self.telemetry.api_errors.labels(kind="ShortAnswer").inc()
            return {}
        out = {r.key: _sizing_of(a) for r, a in zip(asked, answers)}
        unknown = sum(1 for v in out.values() if v is None)
        if unknown:
            self.telemetry.api_errors.labels(kind="NoModel").inc(unknown)
        return out

    # -- decide ------------------------------------------------------------------
    def _seed_budget(self, entries: Sequence[_Entry], now: datetime) -> None:
        """After a restart, count the changes of the last minute (from the policies'
        status) against the token bucket, so a crash loop cannot exceed the budget."""
        self._budget_seeded = True
        bucket = self.budget.bucket
        if bucket is None:
            return
        mono = self._mono()
        for e in entries:
            last = history_from_status(e.obj.status).last_change
            if last is not None and 0 <= (now - last).total_seconds() < 60:
                bucket.try_take(mono)

    def _decide_all(self, entries: Sequence[_Entry], now: datetime) -> None:
        if not self._budget_seeded:
            self._seed_budget(entries, now)
        mono = self._mono()
        for e in entries:
            if e.policy is None or e.workload is None:
                continue
            e.decision = self._decide_one(e, now, mono)

    def _history(self, e: _Entry) -> Any:
        hist = history_from_status(e.obj.status)
        ann = (e.workload.annotations or {}).get(LAST_CHANGE_ANNOTATION) if e.workload is not None else None
        if ann:
            try:
                t = parse_time(ann)
                if hist.last_change is None or t > hist.last_change:
                    hist = replace(hist, last_change=t)
            except ValueError:
                pass
        return hist

    def _decide_one(self, e: _Entry, now: datetime, mono: float, *, spent: bool = False) -> WorkloadDecision:
        """Decide one policy and take its share of the budget. ``spent``: the budget was
        already taken for this workload this pass (a recompute after a conflict)."""
        p = e.policy
        apply = p.mode is Mode.APPLY and not self.config.dry_run and self.config.write
        view = self.budget.view(mono) if apply and not spent else BudgetView()
        wd = decide_workload(
            p, e.inputs, history=self._history(e), now=now, budget=view,
            hpa_on_cpu=e.hpa_on_cpu, dry_run=not apply,
        )
        if wd.changed and not spent:
            retry_at = self._retry_at.get(p.workload_key)
            if retry_at is not None and mono < retry_at:
                return wd.rejected(f"the API server failed earlier; backing off {retry_at - mono:.0f}s more")
            if not self.budget.spend(p.workload_key, mono):
                wd = decide_workload(
                    p, e.inputs, history=self._history(e), now=now,
                    budget=BudgetView(changes_left=0), hpa_on_cpu=e.hpa_on_cpu, dry_run=False,
                )
        return wd

    # -- act ---------------------------------------------------------------------
    def _act_all(
        self, entries: Sequence[_Entry], now: datetime, errors: list[str], *,
        should_stop: Callable[[], bool], may_act: Callable[[], bool],
    ) -> PassResult:
        rows: list[ReviewRow] = []
        patched: list[str] = []
        writes = events = 0
        abandoned = False
        for e in entries:
            if should_stop():
                abandoned = True  # finish nothing half: the rest is left as it was
                break
            if e.policy is not None and e.decision is not None and e.decision.changed:
                if not may_act():
                    abandoned = True  # lost the Lease: another replica acts now
                    break
                self._apply(e, now, errors, may_act=may_act)
                if e.decision.changed:
                    patched.append(e.policy.workload_key)
            elif self._reapplies(e) and may_act():
                self._reapply_in_place(e, errors)
            rows.extend(self._rows(e))
            self._count(e)
            if self.config.write and may_act():
                w, ev = self._write_status_and_events(e, now, errors)
                writes += w
                events += ev
                if w:
                    self._hook("after-status")
        mono = self._mono()
        view = self.budget.view(mono)
        if view.changes_left is not None:
            self.telemetry.budget_left.set(view.changes_left)
        if view.rollouts_free is not None:
            self.telemetry.rollout_slots_left.set(view.rollouts_free)
        outcome = PassOutcome.ABANDONED if abandoned else (PassOutcome.DEGRADED if errors else PassOutcome.DONE)
        requeue = None
        if self._retry_at:
            soonest = min(self._retry_at.values()) - mono
            requeue = max(1.0, soonest)
        return PassResult(
            outcome=outcome,
            rows=tuple(rows),
            policies=len(entries),
            invalid=sum(1 for e in entries if e.invalid is not None),
            patched=tuple(patched),
            status_writes=writes,
            events=events,
            errors=tuple(errors),
            requeue_after=requeue,
        )

    def _apply(self, e: _Entry, now: datetime, errors: list[str], *, may_act: Callable[[], bool]) -> None:
        """Dry-run then patch (or resize pods); on 409 re-read, recompute and retry."""
        p = e.policy
        key = p.workload_key
        for attempt in range(max(1, self.config.conflict_attempts)):
            wd = e.decision
            if not wd.changed:
                return
            try:
                if p.method is Method.IN_PLACE:
                    self._resize_in_place(e, wd, now)
                else:
                    changes = self._changes(wd)

                    def between() -> None:  # after the server-side dry run, before the patch
                        self._hook("after-dry-run")
                        if not may_act():
                            raise _LostLease()

                    try:
                        self._patch(e.workload, changes, now=now, after_dry_run=between)
                    except _LostLease:
                        e.decision = wd.rejected("lost the leader Lease before patching; nothing changed")
                        return
                    self.telemetry.changes.labels(resize_by="Rollout").inc()
                    self._hook("after-patch")
                self._retry_at.pop(key, None)
                if self.backoff is not None:
                    self.backoff.forget(key)
                return
            except KubeConflict as exc:
                self.telemetry.patch_errors.labels(kind="KubeConflict").inc()
                log.info("%s changed under us (%s); re-reading and recomputing", key, exc)
                try:
                    e.workload = self.kube.read_workload(p.namespace, e.workload.kind, p.workload_name)
                except KubeNotFound:
                    e.decision = wd.rejected(f"{key} was deleted")
                    return
                except KubeError as exc2:
                    e.decision = wd.rejected(f"re-reading after a conflict failed: {exc2}")
                    errors.append(str(exc2))
                    return
                self._refresh_inputs(e)
                e.decision = self._decide_one(e, now, self._mono(), spent=True)
            except KubeInvalid as exc:
                self.telemetry.patch_errors.labels(kind="KubeInvalid").inc()
                e.decision = wd.rejected(f"the API server refused the change: {exc.server_message}")
                return
            except KubeError as exc:  # 429/5xx after the adapter's retries, 403, 404 …
                self.telemetry.patch_errors.labels(kind=type(exc).__name__).inc()
                errors.append(f"{key}: {exc}")
                delay = self.backoff.failed(key) if self.backoff is not None else 30.0
                self._retry_at[key] = self._mono() + delay
                e.decision = wd.rejected(f"not applied: {exc}; retried after backoff")
                return
        e.decision = e.decision.rejected(f"still conflicting after {self.config.conflict_attempts} attempts; retried next pass")

    def _patch(self, workload: Any, changes: Mapping[str, Any], *, now: datetime, after_dry_run: Callable[[], None]) -> None:
        """The adapter's dry-run-then-patch; the last-change annotation travels in the
        same patch as the change, and ``after_dry_run`` runs between the two calls."""
        self.kube.patch_cpu(workload, changes, annotations=self._annotations(now), after_dry_run=after_dry_run)

    def _refresh_inputs(self, e: _Entry) -> None:
        """After a re-read: same rates and sizing, new current requests/limits."""
        by_name = {c.name: c for c in e.workload.containers}
        e.inputs = [
            replace(i, request_m=by_name[i.name].cpu_request_m, limit_m=by_name[i.name].cpu_limit_m)
            for i in e.inputs
            if i.name in by_name
        ]

    def _annotations(self, now: datetime) -> dict[str, str]:
        return {LAST_CHANGE_ANNOTATION: format_time(now)}

    @staticmethod
    def _changes(wd: WorkloadDecision) -> dict[str, Any]:
        from ratefit.controller.workload import CpuChange

        out = {}
        for d in wd.changed:
            drop = d.limit_m is not None and d.proposed_limit_m is None
            out[d.container] = CpuChange(
                request_m=d.proposed_m,
                limit_m=None if drop or d.proposed_limit_m == d.limit_m else d.proposed_limit_m,
                drop_limit=drop,
            )
        return out

    def _reapplies(self, e: _Entry) -> bool:
        p = e.policy
        return (p is not None and e.decision is not None and p.method is Method.IN_PLACE and p.mode is Mode.APPLY
                and not self.config.dry_run and self.config.write)

    def _reapply_in_place(self, e: _Entry, errors: list[str]) -> None:
        """New pods start at the template value: resize the pods that differ from the value
        the others run (the last applied decision). Not a new change: no budget, no cooldown."""
        from ratefit.controller.workload import CpuChange

        want = {d.container: CpuChange(request_m=d.current_m, limit_m=d.limit_m)
                for d in e.decision.decisions if d.current_m is not None}
        try:
            if self._resize_pods(e, want, pods=e.pods):
                self._hook("after-patch")
        except KubeError as exc:
            self.telemetry.patch_errors.labels(kind=type(exc).__name__).inc()
            errors.append(f"re-applying {e.policy.workload_key} to new pods: {exc}")

    def _resize_in_place(self, e: _Entry, wd: WorkloadDecision, now: datetime) -> None:
        """Resize the running pods one at a time (the template stays as it is); pods
        already at the new values are skipped, so a re-run after a crash resizes only
        the rest."""
        if self._resize_pods(e, self._changes(wd), pods=None):
            # the change time goes on the workload (metadata only, nothing rolls) right
            # after the resizes, so a crash before the status write keeps the cooldown
            self._record_last_change(e, now)
            self._hook("after-patch")

    def _record_last_change(self, e: _Entry, now: datetime) -> None:
        for _ in range(max(1, self.config.conflict_attempts)):
            try:
                e.workload = self.kube.annotate_workload(e.workload, self._annotations(now))
                return
            except KubeConflict:
                e.workload = self.kube.read_workload(e.workload.namespace, e.workload.kind, e.workload.name)

    def _resize_pods(self, e: _Entry, changes: Mapping[str, Any], *, pods: Sequence[Any] | None) -> int:
        """Resize the pods that differ from ``changes``; returns how many were resized."""
        todo = []
        listed = self.kube.list_pods(e.workload) if pods is None else pods
        for pod in sorted(listed, key=lambda p: p.name):
            running = {c.name: c for c in pod.containers}
            if any(
                name in running and (running[name].spec_cpu_request_m != ch.request_m
                                     or (ch.limit_m is not None and running[name].spec_cpu_limit_m != ch.limit_m))
                for name, ch in changes.items()
            ):
                todo.append(pod)
        if not todo:
            return 0
        # the adapter dry-runs every pod's resize first (a value the server refuses leaves
        # no pod resized), then resizes them one at a time, stopping at the first refusal
        outcomes = self.kube.resize_pods(todo, changes)
        done = sum(1 for o in outcomes if o.ok)
        if done:
            self.telemetry.changes.labels(resize_by="InPlace").inc(done)
        refused = [o for o in outcomes if not o.ok and o.error_kind not in ("KubeNotFound", "Skipped")]
        if refused:  # a pod that went away is fine: its successor starts at the template value
            raise KubeInvalid(refused[0].error or "resize refused", what=f"resize pod {refused[0].pod}")
        return done

    # -- status, events, logs, metrics ---------------------------------------------
    def _new_status(self, e: _Entry, now: datetime) -> dict[str, Any]:
        old = dict(e.obj.status or {})
        gen = e.obj.generation
        conditions = old.get("conditions") or []
        status: dict[str, Any] = {"observedGeneration": gen}
        if e.invalid is not None:
            conditions = set_condition(conditions, invalid_condition(e.invalid, observed_generation=gen, now=now))
            status["conditions"] = conditions
            status["proposals"] = []
            for k in ("lastChange", "settling"):
                if old.get(k) is not None:
                    status[k] = old[k]
            return status
        if e.decision is None:
            cond = make_condition(
                type=CONDITION_READY, status=False, reason="WorkloadNotFound",
                message=(e.problem or "the workload could not be read") + "; nothing is changed until it exists",
                observed_generation=gen, now=now,
            )
            status["conditions"] = set_condition(conditions, cond)
            status["proposals"] = []
            for k in ("lastChange", "settling"):
                if old.get(k) is not None:
                    status[k] = old[k]
            return status
        wd = e.decision
        counts: dict[str, int] = {}
        for d in wd.decisions:
            counts[d.verdict.value] = counts.get(d.verdict.value, 0) + 1
        summary = ", ".join(f"{n} {v}" for v, n in sorted(counts.items()))
        cond = make_condition(
            type=CONDITION_READY, status=True, reason="Decided",
            message=f"{len(wd.decisions)} containers decided: {summary}", observed_generation=gen, now=now,
        )
        status["conditions"] = set_condition(conditions, cond)
        # the CRD's schema has no nullable fields: leave unknown values out
        status["proposals"] = [{k: v for k, v in d.to_status().items() if v is not None} for d in wd.decisions]
        status.update(history_to_status(wd.history))
        return status

    def _write_status_and_events(self, e: _Entry, now: datetime, errors: list[str]) -> tuple[int, int]:
        new = self._new_status(e, now)
        old = dict(e.obj.status or {})
        if _comparable(new) == _comparable({k: old.get(k) for k in new}):
            return 0, 0  # level-based: nothing to say that the status does not already say
        try:
            self.kube.write_policy_status(e.obj.namespace, e.obj.name, new, resource_version=e.obj.resource_version or None)
        except KubeError as exc:  # 409: someone edited the policy; the next pass re-reads it
            self.telemetry.kube_errors.labels(kind=type(exc).__name__).inc()
            errors.append(f"status of {e.obj.namespace}/{e.obj.name}: {exc}")
            return 0, 0
        events = self._events(e, old)
        return 1, events

    def _events(self, e: _Entry, old_status: Mapping[str, Any]) -> int:
        """One Event per container whose proposal is new or different (never the same twice)."""
        old_props = {p.get("container"): p for p in (old_status.get("proposals") or []) if isinstance(p, Mapping)}
        n = 0
        if e.invalid is not None:
            old_conds = {c.get("type"): c for c in old_status.get("conditions") or []}
            if old_conds.get(CONDITION_READY, {}).get("reason") != "PolicyInvalid" or \
                    old_conds.get(CONDITION_READY, {}).get("message") != invalid_condition(e.invalid, observed_generation=None, now=self._now())["message"]:
                n += self._emit(e, reason="PolicyInvalid", type_="Warning", action="Validate",
                                note=f"{e.invalid.field}: {e.invalid.problem}")
            return n
        if e.decision is None:
            old_ready = {c.get("type"): c for c in old_status.get("conditions") or []}.get(CONDITION_READY, {})
            if old_ready.get("reason") != "WorkloadNotFound":
                n += self._emit(e, reason="WorkloadNotFound", type_="Warning", action="Read",
                                note=(e.problem or "the workload could not be read") + "; nothing is changed")
            return n
        # one Event per workload and kind of news, naming every container it concerns
        news: dict[str, list[str]] = {}
        for d in e.decision.decisions:
            before = old_props.get(d.container)
            now_p = d.to_status()
            same = before is not None and all(before.get(k) == now_p.get(k) for k in ("verdict", "why", "proposed", "current"))
            self._log_decision(e, d, changed=not same)
            if same:
                continue
            if d.verdict is Verdict.CHANGED:
                news.setdefault("CpuRequestChanged", []).append(f"{d.container}: {d.message}")
            elif d.verdict is Verdict.PROPOSED:
                news.setdefault("CpuRequestProposed", []).append(f"{d.container}: {d.message}")
            elif d.why is Why.REJECTED:
                news.setdefault("CpuChangeRejected", []).append(f"{d.container}: {d.message}")
        for reason, notes in news.items():
            note = "; ".join(notes)
            if reason == "CpuRequestProposed":
                n += self._emit(e, reason=reason, type_="Normal", action="Propose", note=note + " (dry-run: nothing changed)")
            elif reason == "CpuRequestChanged":
                n += self._emit(e, reason=reason, type_="Normal", action="Resize", note=note)
            else:
                n += self._emit(e, reason=reason, type_="Warning", action="Resize", note=note)
        return n

    def _emit(self, e: _Entry, *, reason: str, type_: str, action: str, note: str) -> int:
        regarding = e.workload.ref if e.workload is not None else e.obj.ref
        try:
            from ratefit.controller.workload import EventType

            self.kube.emit_event(regarding=regarding, related=e.obj.ref, reason=reason, type=EventType(type_),
                                 action=action, note=note)
            return 1
        except KubeError as exc:
            self.telemetry.kube_errors.labels(kind=type(exc).__name__).inc()
            log.warning("event for %s/%s not written: %s", e.obj.namespace, e.obj.name, exc)
            return 0

    def _log_decision(self, e: _Entry, d: Decision, *, changed: bool) -> None:
        if not changed and not decision_log.isEnabledFor(logging.DEBUG):
            return
        record = {
            "msg": "decision", "policy": e.policy.key, "workload": e.policy.workload_key,
            **{k: v for k, v in d.to_status().items()}, "mode": "dry-run" if self.config.dry_run else e.policy.mode.value,
        }
        decision_log.log(logging.INFO if changed else logging.DEBUG, json.dumps(record, sort_keys=True))

    def _count(self, e: _Entry) -> None:
        if e.decision is None:
            return
        for d in e.decision.decisions:
            self.telemetry.decisions.labels(verdict=d.verdict.value, reason=d.why.value).inc()

    def _rows(self, e: _Entry) -> list[ReviewRow]:
        obj = e.obj
        kind = e.policy.workload_kind if e.policy else str((obj.spec.get("workload") or {}).get("kind", "?"))
        wname = e.policy.workload_name if e.policy else str((obj.spec.get("workload") or {}).get("name", "?"))
        if e.invalid is not None or e.decision is None:
            names = [c.name for c in e.policy.containers] if e.policy else [
                str(c.get("name", "?")) for c in (obj.spec.get("containers") or []) if isinstance(c, Mapping)] or ["-"]
            why = ("PolicyInvalid",) if e.invalid is not None else ("WorkloadNotFound",)
            note = f"{e.invalid.field}: {e.invalid.problem}" if e.invalid is not None else (e.problem or "")
            return [ReviewRow(namespace=obj.namespace, policy=obj.name, kind=kind, workload=wname, container=n,
                              verdict="held", why=why, note=note) for n in names]
        method = e.policy.method.value
        mode = "dry-run" if (self.config.dry_run or e.policy.mode is Mode.DRY_RUN) else "apply"
        rows = []
        for d in e.decision.decisions:
            moving = d.verdict is not Verdict.HELD or d.moves
            rows.append(ReviewRow(
                namespace=obj.namespace, policy=obj.name, kind=kind, workload=wname, container=d.container,
                verdict=d.verdict.value, why=(d.why.value,), current_m=d.current_m,
                proposed_m=d.proposed_m if moving else d.current_m,
                demand_m=_m(d.demand), upper_m=_m(d.upper), rate=d.rate, limit_m=d.limit_m,
                proposed_limit_m=d.proposed_limit_m, mode=mode, method=method, extrapolated=d.extrapolated,
                note=d.message, cgroup=_cgroup(d.proposed_m, d.proposed_limit_m),
            ))
        return rows

    def _finish(self, result: PassResult, t0: float, phases: Mapping[str, float]) -> PassResult:
        dur = self._mono() - t0
        self.telemetry.passes.labels(outcome=result.outcome.value).inc()
        if result.outcome in (PassOutcome.DONE, PassOutcome.DEGRADED):
            self.telemetry.set_cpu(
                CpuSample(namespace=r.namespace, workload=f"{r.kind}/{r.workload}", container=r.container,
                          request_m=r.current_m, demand_m=r.demand_m, demand_bound_m=r.upper_m)
                for r in result.rows)
        self.telemetry.pass_duration.observe(dur)
        self.telemetry.last_pass.set(time.time())
        log.info(json.dumps({
            "msg": "pass", "identity": self.config.identity, "outcome": result.outcome.value, "policies": result.policies,
            "invalid": result.invalid, "patched": len(result.patched), "status_writes": result.status_writes,
            "events": result.events, "errors": len(result.errors), "seconds": round(dur, 3),
        }, sort_keys=True))
        return replace(result, duration_s=dur, phases=dict(phases))


class _LostLease(Exception):
    """Raised between the dry run and the patch when this replica no longer leads."""


def _cgroup(request_m: int | None, limit_m: int | None) -> dict[str, Any] | None:
    """What the kernel gets for a request/limit (controller/cgroup), when that module is there."""
    if request_m is None:
        return None
    from ratefit.controller.cgroup import cgroup_figures

    try:
        f = cgroup_figures(request_m, limit_m)
    except (ValueError, TypeError):  # a review extra must never break a pass
        return None
    return {"shares": f.shares, "weight_linear": f.weight_linear, "weight_log": f.weight_log,
            "quota_us": f.quota_us, "period_us": f.period_us, "cpu_max": f.cpu_max}
