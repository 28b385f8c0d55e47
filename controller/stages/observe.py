"""Observe: one frozen snapshot of the world for a pass (all reads first, batched).

List the policies (one LIST per namespace, or one cluster-wide), parse each (an
invalid one is kept with its :class:`~ratefit.controller.policy.PolicyInvalid`); LIST
the Deployments, StatefulSets and HorizontalPodAutoscalers once per namespace that
has policies (never a GET per policy); for ``resizeBy: InPlace`` the workload's pods;
ask the rate source for every container's per-pod rate in one grouped query (in a
thread, while the workloads are listed) and the sizing API for every (model, rate)
in one batch call. The result, :class:`Snapshot`, is what the decide stage reads.

Under a horizontal autoscaler (``controller/hpa_sizing``): the sizing API is asked at
the rate the decision will use (max(observed, T × (1 + tolerance)) under a per-pod
rate target); for the workload's models the trained range and capacity are read
(``GET /v1/models/{key}``, one per model) and, under a CPU-utilisation target, the
curve at :data:`~ratefit.controller.hpa_sizing.GRID_POINTS` rates over the trained
range in one more batch call. A failure there only drops the autoscaler's extras.

A LIST that fails (429/5xx after the adapter's retries, 403 …) does not make its
workloads "not found": their policies are marked ``unavailable`` (held
``ApiUnavailable``, status left as it was) — a partial observation never rewrites
status.

Two valid policies naming the same workload (:func:`conflicts`, a pure function of the
listed policies): the older one (``creationTimestamp``, then name) keeps acting; each
newer one is marked ``conflict_with`` the older and is held **PolicyConflict**.
"""

from __future__ import annotations

import logging
import math
import threading
import time
import zlib
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from datetime import datetime

from ratefit.controller.crd import API_VERSION, KIND
from ratefit.controller.decide import ContainerInput, Sizing
from ratefit.controller.errors import KubeError
from ratefit.controller.hpa_sizing import AutoscalerView, ModelFacts, autoscaler_view, curve_grid, sizing_rate
from ratefit.controller.metrics_source import RateRequest, RateResult
from ratefit.controller.policy import Policy, ResizeBy, PolicyInvalid, format_duration, parse_policy
from ratefit.controller.stages.ports import KubeReader, RateSource, SizingSource
from ratefit.controller.telemetry import Telemetry
from ratefit.controller.workload import HorizontalScaler, Pod, PolicyObject, Workload
from ratefit.controller.staleness import ALPHA, DEFAULT_COVERAGE, Staleness, band_rates, judge
from ratefit.models.errors import RatefitError, UnknownModel

__all__ = ["Observed", "Observer", "Snapshot", "conflicts", "policy_object_dict", "shard_of"]

log = logging.getLogger("ratefit.controller.reconcile")

#: up to this many namespaces with policies, workloads are listed per namespace
LIST_PER_NAMESPACE_UP_TO = 3
#: seconds a model's detail (trained range, capacity) is reused before it is read again
FACTS_TTL_S = 600.0


@dataclass(frozen=True)
class Observed:
    """One SizingPolicy as observed this pass."""

    obj: PolicyObject
    policy: Policy | None = None
    invalid: PolicyInvalid | None = None
    workload: Workload | None = None
    hpa_on_cpu: bool = False
    inputs: tuple[ContainerInput, ...] = ()
    #: why nothing can be decided (the workload is missing, or its LIST failed)
    problem: str | None = None
    #: True: the workload could not be observed (the API failed), not "not found"
    unavailable: bool = False
    #: ``resizeBy: InPlace``: the workload's pods, as listed this pass
    pods: tuple[Pod, ...] | None = None
    #: the workload's horizontal autoscaler, as sizing sees it (None: none)
    autoscaler: AutoscalerView | None = None
    #: ``namespace/name`` of the older SizingPolicy naming the same workload (this one is held)
    conflict_with: str | None = None


@dataclass(frozen=True)
class Snapshot:
    """What one pass saw, in the fixed order (namespace, name)."""

    now: datetime
    entries: tuple[Observed, ...]
    #: workload keys whose rollout is in progress (the rollout slots follow them)
    rolling: tuple[str, ...] = ()
    #: inputs that failed (the pass is DEGRADED); the affected containers are held
    errors: tuple[str, ...] = ()
    #: wall seconds of the observe stage's parts (for the benchmark)
    split: Mapping[str, float] = field(default_factory=dict)
    #: ``namespace/policy/container`` → this pass's staleness verdict (only containers checked)
    staleness: Mapping[str, Staleness] = field(default_factory=dict)


def shard_of(namespace: str, count: int) -> int:
    """The shard (0 … count−1) of a namespace: CRC-32 of its name (stable across
    processes and versions, unlike Python's ``hash``) modulo ``count``."""
    return zlib.crc32(namespace.encode("utf-8")) % count


def conflicts(valid: Sequence[tuple[PolicyObject, Policy]]) -> dict[tuple[str, str], str]:
    """(namespace, name) of every policy that names a workload an older policy already
    names → ``namespace/name`` of that older policy. Older: the earlier
    ``creationTimestamp`` (RFC 3339 in UTC, so text order is time order), then the name —
    a total order, so every pass and every replica picks the same one."""
    by_workload: dict[str, list[tuple[str, str, PolicyObject]]] = {}
    for o, p in valid:
        by_workload.setdefault(p.workload_key, []).append((o.created or "~", o.name, o))
    out: dict[tuple[str, str], str] = {}
    for group in by_workload.values():
        if len(group) < 2:
            continue
        group.sort(key=lambda t: (t[0], t[1]))
        oldest = group[0][2]
        for _, _, o in group[1:]:
            out[(o.namespace, o.name)] = f"{oldest.namespace}/{oldest.name}"
    return out


def policy_object_dict(obj: PolicyObject) -> dict[str, object]:
    """A stored SizingPolicy (``workload.PolicyObject``) as the object ``parse_policy`` reads."""
    return {
        "apiVersion": API_VERSION,
        "kind": KIND,
        "metadata": {"namespace": obj.namespace, "name": obj.name, "generation": obj.generation},
        "spec": dict(obj.spec or {}),
    }


def _kind_value(kind: object) -> str:
    return str(getattr(kind, "value", kind))


def sizing_of(answer: object) -> Sizing | None:
    """One item of the sizing API's batch answer → Sizing (cores), or None."""
    if answer is None:
        return None
    if isinstance(answer, Sizing):
        return answer
    get = answer.get if isinstance(answer, Mapping) else (lambda k, d=None: getattr(answer, k, d))
    if get("error"):
        return None
    demand_m, bound_m = get("demand_m"), get("demand_bound_m")
    if demand_m is None or bound_m is None:
        return None
    return Sizing(demand=float(demand_m) / 1000.0, upper=float(bound_m) / 1000.0,
                  extrapolated=bool(get("extrapolated", False)))


#: the sizing API's per-item error reasons (models/api_routes) → the held reason
_SIZING_REASONS = {"unknown_model": "NoModel", "invalid_model": "InvalidModelKey",
                   "out_of_range": "DemandOutOfRange", "invalid_rate": "NoMetrics", "invalid_item": "NoModel"}


def sizing_problem(answer: object) -> tuple[str, str] | None:
    """The held reason and message of one item the sizing API answered with an error."""
    if answer is None or isinstance(answer, Sizing):
        return None
    get = answer.get if isinstance(answer, Mapping) else (lambda k, d=None: getattr(answer, k, d))
    error = get("error")
    if not error:
        return None
    return _SIZING_REASONS.get(str(get("reason") or ""), "NoModel"), str(error)


class _WrongLength(Exception):
    """The sizing API answered another number of items than it was asked."""

    def __init__(self, got: int, asked: int) -> None:
        super().__init__(f"{got} answers for {asked} items")
        self.got, self.asked = got, asked


class Observer:
    """Builds a :class:`Snapshot` per pass. Keeps only the parsed policies across
    passes (the spec changes only with the generation: each is parsed once)."""

    def __init__(
        self, *, reader: KubeReader, rates: RateSource, sizing: SizingSource, telemetry: Telemetry,
        namespaces: tuple[str, ...] = (), shard: tuple[int, int] | None = None,
        usage: object | None = None, coverage: float = DEFAULT_COVERAGE, alpha: float = ALPHA,
    ) -> None:
        #: recent (rate, CPU) samples per container (``controller/usage_source``); None: no staleness check
        self.usage = usage
        self.coverage = coverage
        self.alpha = alpha
        self.reader = reader
        self.rates = rates
        self.sizing = sizing
        self.telemetry = telemetry
        self.namespaces = namespaces
        self.shard = shard
        self._parsed: dict[tuple[str, str, str, int], Policy | PolicyInvalid] = {}
        #: model → (monotonic time read, its facts or None): the model detail is read at most
        #: every FACTS_TTL_S per model (models are retrained daily; a range minutes old is fine)
        self._facts: dict[str, tuple[float, ModelFacts | None]] = {}
        #: (model, rate) → the sizing API's answer, for store version ``_answers_version``
        self._answers: dict[tuple[str, float], object] = {}
        self._answers_version: str | None = None
        #: items sent to the sizing API in the last pass's demand batch (the rest were reused)
        self.sizing_asked = 0

    def observe(self, now: datetime) -> Snapshot:
        """One snapshot. Raises KubeError when the policies cannot be listed."""
        errors: list[str] = []
        #: "namespace/policy/container" → (reason, message) of an input that failed for it alone
        problems: dict[str, tuple[str, str]] = {}
        t_g0 = time.perf_counter()
        objs = list(self.reader.list_policies(list(self.namespaces) or None).items)
        if self.shard is not None:
            index, count = self.shard
            objs = [o for o in objs if shard_of(o.namespace, count) == index]
        objs.sort(key=lambda o: (o.namespace, o.name))
        parsed = self._parse(objs)
        valid = [(o, p) for o, p in zip(objs, parsed) if isinstance(p, Policy)]
        self.telemetry.policies.labels(state="valid").set(len(valid))
        self.telemetry.policies.labels(state="invalid").set(len(objs) - len(valid))

        # the rates depend only on the policies: ask Prometheus while the workloads are listed
        window_texts: dict[float, str] = {}
        requests: list[RateRequest] = []
        models: dict[tuple[str, str, str], str] = {}
        for _, p in valid:
            if p.rate_window_s not in window_texts:
                window_texts[p.rate_window_s] = format_duration(p.rate_window_s)
            for c in p.containers:
                requests.append(RateRequest(
                    namespace=p.namespace, policy=p.name, workload=p.workload_name, container=c.name,
                    workload_kind=p.workload_kind, query=c.rate_query, rate_window=window_texts[p.rate_window_s], percentile=p.rate_percentile,
                ))
                models[(p.namespace, p.name, c.name)] = c.model
        rate_box: dict[str, object] = {}

        def ask_rates() -> None:
            t = time.perf_counter()
            try:
                rate_box["rates"] = self._query_rates(requests, errors, problems)
            except BaseException as exc:  # handed to the pass's thread below
                rate_box["error"] = exc
            rate_box["seconds"] = time.perf_counter() - t

        rate_thread = threading.Thread(target=ask_rates, name="ratefit-rates", daemon=True)
        rate_thread.start()
        scalers: dict[tuple[str, str, str], list[HorizontalScaler]] = {}
        try:
            workloads, hpa_cpu, rolling, failed = self._list_workloads([p for _, p in valid], errors, scalers)
            t_lists = time.perf_counter()
        finally:
            rate_thread.join()
        t_rates = time.perf_counter()
        if "error" in rate_box:
            raise rate_box["error"]  # type: ignore[misc]
        rates: dict[str, float | None] = rate_box["rates"]  # type: ignore[assignment]

        found: set[tuple[str, str]] = set()
        for _, p in valid:
            if (p.namespace, p.workload_kind, p.workload_name) in workloads:
                found.add((p.namespace, p.name))
        asked = [r for r in requests if (r.namespace, r.policy) in found]
        views = self._autoscaler_views(valid, workloads, scalers)
        facts = self._model_facts(asked, models, views, errors)
        sizing_rates = dict(rates)
        for r in asked:
            view = views.get((r.namespace, r.policy))
            if view is not None and view.rate_target is not None:
                f = facts.get(r.key)
                sizing_rates[r.key] = sizing_rate(view, rates.get(r.key), capacity=f.capacity if f else None)
        sizing = self._query_sizing(asked, models, sizing_rates, errors, problems)
        facts = self._curve_points(asked, models, views, facts, errors)
        t_sizing = time.perf_counter()
        staleness: dict[str, Staleness] = {}
        if self.usage is not None:
            kinds = {(p.namespace, p.name): p.workload_kind for _, p in valid}
            staleness = self._staleness([r for r in asked if sizing.get(r.key) is not None], kinds, models, errors,
                                        workloads)

        clashes = conflicts(valid)
        entries = []
        for o, got in zip(objs, parsed):
            if isinstance(got, PolicyInvalid):
                entries.append(Observed(obj=o, invalid=got))
                continue
            one = self._one(o, got, workloads, hpa_cpu, failed, rates, sizing, errors, problems,
                            views=views, facts=facts, staleness=staleness)
            older = clashes.get((o.namespace, o.name))
            entries.append(one if older is None else replace(one, conflict_with=older))
        split = {"gather_kube": t_lists - t_g0, "gather_rates": float(rate_box.get("seconds", 0.0)),  # type: ignore[arg-type]
                 "gather_rates_wait": t_rates - t_lists, "gather_sizing": t_sizing - t_rates}
        if self.usage is not None:
            split["gather_usage"] = time.perf_counter() - t_sizing
        return Snapshot(now=now, entries=tuple(entries), rolling=tuple(rolling), errors=tuple(errors), split=split,
                        staleness=staleness)

    # -- parts ---------------------------------------------------------------------
    def _parse(self, objs: Sequence[PolicyObject]) -> list[Policy | PolicyInvalid]:
        cache: dict[tuple[str, str, str, int], Policy | PolicyInvalid] = {}
        out: list[Policy | PolicyInvalid] = []
        for o in objs:
            ck = (o.namespace, o.name, o.uid, o.generation)
            got = self._parsed.get(ck)
            if got is None:
                try:
                    got = parse_policy(policy_object_dict(o))
                except PolicyInvalid as exc:
                    got = exc
            cache[ck] = got
            out.append(got)
        self._parsed = cache  # forget policies that are gone
        return out

    def _list_workloads(
        self, policies: Sequence[Policy], errors: list[str],
        scalers: dict[tuple[str, str, str], list[HorizontalScaler]] | None = None,
    ) -> tuple[dict[tuple[str, str, str], Workload], set[tuple[str, str, str]], list[str], dict[tuple[str, str], str]]:
        """One LIST of workloads and of HPAs per namespace that has policies. Returns the
        workloads by (namespace, kind, name), the HPA-on-CPU targets, the rolling
        workload keys and the (namespace or "*", kind or "HPA") scopes whose LIST failed."""
        workloads: dict[tuple[str, str, str], Workload] = {}
        hpa_cpu: set[tuple[str, str, str]] = set()
        rolling: list[str] = []
        failed: dict[tuple[str, str], str] = {}
        policy_ns = sorted({p.namespace for p in policies})
        kinds = sorted({p.workload_kind for p in policies})
        # many namespaces: one paged cluster-wide LIST per kind beats one LIST per namespace
        many = len(policy_ns) > LIST_PER_NAMESPACE_UP_TO and not self.namespaces
        scopes: list[str | None] = [None] if many else list(policy_ns)
        wanted = set(policy_ns)
        for ns in scopes:
            where = ns or "all namespaces"
            for kind in kinds:
                try:
                    for w in self.reader.list_workloads(kind, namespace=ns):
                        if w.namespace not in wanted:
                            continue
                        workloads[(w.namespace, _kind_value(w.kind), w.name)] = w
                        if w.rollout_in_progress:
                            rolling.append(w.key)
                except KubeError as exc:
                    self.telemetry.kube_errors.labels(kind=type(exc).__name__).inc()
                    errors.append(f"list {kind}s in {where}: {exc}")
                    failed[(ns or "*", kind)] = f"listing {kind}s in {where} failed: {exc}"
            try:
                for h in self.reader.list_hpas(ns):
                    if h.scales_on_cpu_utilization:
                        hpa_cpu.add((h.namespace, h.target_kind, h.target_name))
                    if scalers is not None:
                        scalers.setdefault((h.namespace, h.target_kind, h.target_name), []).append(h)
            except KubeError as exc:
                self.telemetry.kube_errors.labels(kind=type(exc).__name__).inc()
                errors.append(f"list horizontal autoscalers in {where}: {exc}")
                failed[(ns or "*", "HPA")] = f"listing horizontal autoscalers in {where} failed: {exc}"
        return workloads, hpa_cpu, rolling, failed

    def _one(
        self, o: PolicyObject, p: Policy, workloads: Mapping[tuple[str, str, str], Workload],
        hpa_cpu: set[tuple[str, str, str]], failed: Mapping[tuple[str, str], str],
        rates: Mapping[str, float | None], sizing: Mapping[str, Sizing | None], errors: list[str],
        problems: Mapping[str, tuple[str, str]] | None = None, *,
        views: Mapping[tuple[str, str], AutoscalerView] | None = None, facts: Mapping[str, ModelFacts] | None = None,
        staleness: Mapping[str, Staleness] | None = None,
    ) -> Observed:
        problems = problems or {}
        # a failed LIST (workloads of this kind, or HPAs) means "unknown", never "not found"
        why_unknown = next((failed[s] for s in ((p.namespace, p.workload_kind), ("*", p.workload_kind),
                                                (p.namespace, "HPA"), ("*", "HPA")) if s in failed), None)
        if why_unknown is not None:
            return Observed(obj=o, policy=p, problem=why_unknown + "; the last status is kept", unavailable=True)
        w = workloads.get((p.namespace, p.workload_kind, p.workload_name))
        if w is None:
            return Observed(obj=o, policy=p, problem=f"{p.workload_key} not found")
        pods: tuple[Pod, ...] | None = None
        running: dict[str, tuple[int | None, int | None]] = {}
        if p.resize_by is ResizeBy.IN_PLACE:
            pods, running = self._running_values(p, w, errors)
        by_name = {c.name: c for c in w.containers}
        inputs = []
        for c in p.containers:
            wc = by_name.get(c.name)
            if wc is None:
                continue  # decide holds it NoMetrics with a message naming the container
            current_req, current_lim = running.get(c.name, (wc.cpu_request_m, wc.cpu_limit_m))
            inputs.append(ContainerInput(
                name=c.name, request_m=current_req, limit_m=current_lim,
                rate=rates.get(f"{p.key}/{c.name}"), sizing=sizing.get(f"{p.key}/{c.name}"),
                stale=(staleness or {}).get(f"{p.key}/{c.name}"),
                rate_problem=problems.get(f"rate:{p.key}/{c.name}"),
                sizing_problem=problems.get(f"sizing:{p.key}/{c.name}"),
                facts=(facts or {}).get(f"{p.key}/{c.name}"),
            ))
        return Observed(obj=o, policy=p, workload=w, inputs=tuple(inputs), pods=pods,
                        hpa_on_cpu=(p.namespace, p.workload_kind, p.workload_name) in hpa_cpu,
                        autoscaler=(views or {}).get((p.namespace, p.name)))

    def _running_values(
        self, p: Policy, w: Workload, errors: list[str],
    ) -> tuple[tuple[Pod, ...], dict[str, tuple[int | None, int | None]]]:
        """``resizeBy: InPlace``: what the pods run (their spec after resizes), per container —
        the value most pods agree on. The template keeps the old value, so deciding from it
        would propose the same resize every pass."""
        try:
            pods = tuple(self.reader.list_pods(w))
        except KubeError as exc:
            self.telemetry.kube_errors.labels(kind=type(exc).__name__).inc()
            errors.append(f"list pods of {p.workload_key}: {exc}")
            return (), {}
        out: dict[str, tuple[int | None, int | None]] = {}
        for c in p.containers:
            seen: dict[tuple[int | None, int | None], int] = {}
            for pod in pods:
                for pc in pod.containers:
                    if pc.name == c.name:
                        v = (pc.spec_cpu_request_m, pc.spec_cpu_limit_m)
                        seen[v] = seen.get(v, 0) + 1
            if seen:
                out[c.name] = max(sorted(seen, key=lambda v: (v[0] or 0, v[1] or 0)), key=lambda v: seen[v])
        return pods, out

    def _query_rates(
        self, requests: Sequence[RateRequest], errors: list[str], problems: dict[str, tuple[str, str]] | None = None,
    ) -> dict[str, float | None]:
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
            out[r.key] = float(v) if ok else None  # type: ignore[arg-type]
            if not ok:
                missing += 1
                if res is not None and problems is not None:
                    problems[f"rate:{r.key}"] = (res.why or "NoMetrics", res.status_message())
                first_message = first_message or (res.message if res is not None else "no answer")
        if missing:
            self.telemetry.rate_query_errors.labels(kind="NoMetrics").inc(missing)
            errors.append(f"rates: {missing} of {len(requests)} containers without a usable rate ({first_message})")
            log.warning("%d containers without a usable rate; held with NoMetrics: %s", missing, first_message)
        return out

    def _query_sizing(
        self, requests: Sequence[RateRequest], models: Mapping[tuple[str, str, str], str],
        rates: Mapping[str, float | None], errors: list[str], problems: dict[str, tuple[str, str]] | None = None,
    ) -> dict[str, Sizing | None]:
        asked = [r for r in requests if rates.get(r.key) is not None]
        if not asked:
            return {}
        items = [(models[(r.namespace, r.policy, r.container)], float(rates[r.key])) for r in asked]  # type: ignore[arg-type]
        try:
            answers = self._demand_answers(items)
        except RatefitError as exc:  # sizing API down: every container NoModel
            self.telemetry.api_errors.labels(kind=type(exc).__name__).inc()
            errors.append(f"sizing API: {exc}")
            log.warning("sizing API failed; holding every container with NoModel: %s", exc)
            return {}
        except _WrongLength as exc:
            errors.append(f"sizing API answered {exc.got} items for {exc.asked} asked")
            self.telemetry.api_errors.labels(kind="ShortAnswer").inc()
            return {}
        out = {r.key: sizing_of(a) for r, a in zip(asked, answers)}
        if problems is not None:
            for r, a in zip(asked, answers):
                problem = sizing_problem(a)
                if problem is not None:
                    problems[f"sizing:{r.key}"] = problem
        unknown = sum(1 for v in out.values() if v is None)
        if unknown:
            self.telemetry.api_errors.labels(kind="NoModel").inc(unknown)
        return out

    def _demand_answers(self, items: Sequence[tuple[str, float]]) -> Sequence[object]:
        """The sizing API's answers for ``items``, in order. Answers of the last pass for the
        same (model, rate) are reused while the API's store version (``/readyz``) stays the
        same — a model's answer at a rate changes only with the model — and only the other
        items are asked, in one batch call. A source without ``health`` (or a store without a
        version) is asked for everything, every pass."""
        version = self._store_version()
        memo = self._answers if version is not None and version == self._answers_version else {}
        todo = list(dict.fromkeys(it for it in items if it not in memo))
        self.sizing_asked = len(todo)
        got = list(self.sizing.demand_batch(todo)) if todo else []
        if len(got) != len(todo):
            raise _WrongLength(len(got), len(todo))
        fresh = dict(zip(todo, got))
        answers = [fresh[it] if it in fresh else memo[it] for it in items]
        if version is not None:
            self._answers = dict(zip(items, answers))  # only this pass's items: bounded by the containers
            self._answers_version = version
        return answers

    def _store_version(self) -> str | None:
        health = getattr(self.sizing, "health", None)
        if health is None:
            return None
        try:
            v = getattr(health(), "store_version", None)
        except Exception:  # no usable version (API down, a garbage answer): no reuse; the batch call says what is wrong
            return None
        return str(v) if v else None

    def _judge(
        self, asked: Sequence[RateRequest], kinds: Mapping[tuple[str, str], str],
        models: Mapping[tuple[str, str, str], str], facts: Mapping[str, tuple[float | None, str | None]],
        judged_model: Mapping[str, tuple[str, str | None]], errors: list[str], memo: object | None, sizing: object,
    ) -> dict[str, Staleness]:
        """The judgement of ``asked`` (I/O: two range queries per container, one sizing batch
        for all bands), remembered in ``memo`` when there is one; the verdicts without the
        image check. Runs in the pass (plan) or on the background judge's thread (run)."""
        from ratefit.controller.usage_source import UsageRequest

        out: dict[str, Staleness] = {}
        if not asked:
            return out
        reqs = [UsageRequest(namespace=r.namespace, policy=r.policy, workload_kind=kinds[(r.namespace, r.policy)],
                             workload=r.workload, container=r.container, rate_query=r.query) for r in asked]
        try:
            got = self.usage.usage(reqs)  # type: ignore[union-attr]
        except RatefitError as exc:
            errors.append(f"recent usage: {exc}")
            got = {}
        items: list[tuple[str, float]] = []
        spans: list[tuple[RateRequest, object, object, int, int]] = []
        for r in asked:
            res = got.get(r.key)
            if res is None or not getattr(res, "count", 0):
                if memo is not None and res is not None and getattr(res, "answered", False):
                    memo.put(r.key, judged_model[r.key], None)  # type: ignore[attr-defined]  # nothing to judge until its next turn
                continue
            grid = band_rates(res.rates)
            model = models[(r.namespace, r.policy, r.container)]
            spans.append((r, res, grid, len(items), len(items) + len(grid)))
            items.extend((model, float(g)) for g in grid)
        answers = []
        if items:
            try:
                answers = sizing.demand_batch(items)  # type: ignore[attr-defined]
            except RatefitError as exc:
                errors.append(f"sizing API (band for the staleness check): {exc}")
        if len(answers) != len(items):
            answers, spans = [], []
        for r, res, grid, a, b in spans:
            bounds = [sizing_of(x) for x in answers[a:b]]
            if any(v is None for v in bounds):
                continue
            cov = facts.get(models[(r.namespace, r.policy, r.container)], (None, None))[0] or self.coverage
            st = judge(res.rates, res.cpu, grid, [v.upper for v in bounds],  # type: ignore[union-attr]
                       coverage=cov, alpha=self.alpha, timestamps=res.timestamps)
            if memo is not None:
                memo.put(r.key, judged_model[r.key], st)  # type: ignore[attr-defined]
            out[r.key] = st
        return out

    # -- the workload's horizontal autoscaler (controller/hpa_sizing) ------------------------
    def _autoscaler_views(
        self, valid: Sequence[tuple[PolicyObject, Policy]], workloads: Mapping[tuple[str, str, str], Workload],
        scalers: Mapping[tuple[str, str, str], Sequence[HorizontalScaler]],
    ) -> dict[tuple[str, str], AutoscalerView]:
        """(namespace, policy) → the view of the autoscaler targeting its workload."""
        out: dict[tuple[str, str], AutoscalerView] = {}
        for _, p in valid:
            wk = (p.namespace, p.workload_kind, p.workload_name)
            w = workloads.get(wk)
            view = autoscaler_view(scalers.get(wk, ()), metric_name=p.autoscaler_rate_metric,
                                   workload_replicas=w.replicas if w is not None else 0) if w is not None else None
            if view is not None:
                out[(p.namespace, p.name)] = view
        return out

    def _model_facts(
        self, asked: Sequence[RateRequest], models: Mapping[tuple[str, str, str], str],
        views: Mapping[tuple[str, str], AutoscalerView], errors: list[str],
    ) -> dict[str, ModelFacts]:
        """Trained range and capacity of each model under an autoscaler (one GET per model)."""
        detail = getattr(self.sizing, "model_detail", None)
        if detail is None or not views:
            return {}
        by_model: dict[str, ModelFacts | None] = {}
        out: dict[str, ModelFacts] = {}
        mono = time.monotonic()
        for r in asked:
            if (r.namespace, r.policy) not in views:
                continue
            model = models[(r.namespace, r.policy, r.container)]
            cached = self._facts.get(model)
            if model not in by_model and cached is not None and mono - cached[0] < FACTS_TTL_S:
                by_model[model] = cached[1]
            if model not in by_model:
                by_model[model] = None
                try:
                    d = detail(model)
                    lo, hi = (float(d["rate_range"][0]), float(d["rate_range"][1]))
                    cap = d.get("capacity")
                    cap = float(cap) if isinstance(cap, (int, float)) and not isinstance(cap, bool) else None
                    if math.isfinite(lo) and math.isfinite(hi) and 0 <= lo < hi:
                        by_model[model] = ModelFacts(
                            rate_lo=lo, rate_hi=hi,
                            capacity=cap if cap is not None and math.isfinite(cap) and cap > 0 else None)
                except UnknownModel:  # held NoModel by the decision already: not a failure of the pass
                    self._facts[model] = (mono, None)
                except (RatefitError, KeyError, TypeError, ValueError, IndexError) as exc:
                    errors.append(f"sizing API: model {model}: {exc}")
                else:
                    self._facts[model] = (mono, by_model[model])
            f = by_model[model]
            if f is not None:
                out[r.key] = f
        return out

    def _curve_points(
        self, asked: Sequence[RateRequest], models: Mapping[tuple[str, str, str], str],
        views: Mapping[tuple[str, str], AutoscalerView], facts: Mapping[str, ModelFacts], errors: list[str],
    ) -> dict[str, ModelFacts]:
        """Under a CPU-utilisation autoscaler: demand at a grid of rates over each model's
        trained range, all in one batch call."""
        out = dict(facts)
        wanted: dict[str, tuple[float, ...]] = {}
        for r in asked:
            view = views.get((r.namespace, r.policy))
            f = facts.get(r.key)
            if view is None or view.cpu is None or f is None:
                continue
            wanted.setdefault(models[(r.namespace, r.policy, r.container)], curve_grid(f.rate_lo, f.rate_hi))
        if not wanted:
            return out
        items = [(m, rate) for m, grid in wanted.items() for rate in grid]
        try:
            answers = self.sizing.demand_batch(items)
        except RatefitError as exc:
            errors.append(f"sizing API (curve points): {exc}")
            return out
        if len(answers) != len(items):
            errors.append(f"sizing API answered {len(answers)} curve points for {len(items)} asked")
            return out
        curves: dict[str, tuple[float, ...]] = {}
        i = 0
        for m, grid in wanted.items():
            got = [sizing_of(a) for a in answers[i:i + len(grid)]]
            i += len(grid)
            if all(g is not None for g in got):
                curves[m] = tuple(g.demand for g in got)  # type: ignore[union-attr]
        for r in asked:
            m = models[(r.namespace, r.policy, r.container)]
            if r.key in out and m in curves:
                f = out[r.key]
                out[r.key] = ModelFacts(rate_lo=f.rate_lo, rate_hi=f.rate_hi, capacity=f.capacity,
                                        rates=wanted[m], demand=curves[m])
        return out

    def _staleness(
        self, asked: Sequence[RateRequest], kinds: Mapping[tuple[str, str], str],
        models: Mapping[tuple[str, str, str], str], errors: list[str],
        workloads: Mapping[tuple[str, str, str], Workload] | None = None,
    ) -> dict[str, Staleness]:
        """Each container's recent (rate, CPU) samples against its model's band at those
        rates (``controller/staleness``). The band comes from ONE sizing batch for all
        containers, at most ``staleness.MAX_BAND_POINTS`` rates each. Trouble here never
        holds a container: it is simply not judged this pass."""
        if not asked:
            return {}
        # what the models say about themselves (coverage, training image), when the source knows;
        # with a background judge the pass reads only what is cached (the judge asks the API)
        facts_src = getattr(self.usage, "facts", None)
        background = getattr(self.usage, "background", None)
        facts = facts_src.lookup([models[(r.namespace, r.policy, r.container)] for r in asked],
                                 fetch=background is None) if facts_src else {}
        image_msgs: dict[str, str] = {}
        for r in asked:
            trained_on = facts.get(models[(r.namespace, r.policy, r.container)], (None, None))[1]
            w = (workloads or {}).get((r.namespace, kinds[(r.namespace, r.policy)], r.workload))
            running = next((c.image for c in (w.containers if w else ()) if c.name == r.container), None)
            if trained_on and running and running != trained_on:
                image_msgs[r.key] = f"image changed since training: trained on {trained_on}, runs {running}"
        # judge only the containers whose turn it is; the others carry their last verdict
        everyone = list(asked)
        memo = getattr(self.usage, "memo", None)
        version_of = getattr(facts_src, "version", None)
        judged_model = {r.key: (models[(r.namespace, r.policy, r.container)],
                                version_of(models[(r.namespace, r.policy, r.container)]) if version_of else None)
                        for r in asked}
        carried: dict[str, Staleness] = {}
        judged: dict[str, Staleness] = {}
        if memo is not None:
            due = set(memo.due([(r.key, judged_model[r.key]) for r in asked]))
            asked = [r for r in asked if r.key in due]
        if memo is not None and background is not None:
            # ratefit run: the judgements run on the judge's thread; the pass reads what is known
            if asked:
                job_asked, sizing = list(asked), getattr(background, "sizing", None) or self.sizing

                def job() -> None:
                    problems: list[str] = []
                    job_facts = facts_src.lookup([models[(r.namespace, r.policy, r.container)] for r in job_asked],
                                                 via=sizing) if facts_src else {}
                    # the versions as just read, so the next pass finds the judgement its own
                    job_model = {r.key: (judged_model[r.key][0], version_of(judged_model[r.key][0])
                                         if version_of else None) for r in job_asked}
                    self._judge(job_asked, kinds, models, job_facts, job_model, problems, memo, sizing)
                    for p in problems:
                        log.warning("staleness check: %s", p)

                background.submit(job)
            carried = memo.known(r.key for r in everyone)
        else:
            if memo is not None:
                carried = memo.known(r.key for r in everyone if r.key not in due)
            judged = self._judge(asked, kinds, models, facts, judged_model, errors, memo, self.sizing)
        out: dict[str, Staleness] = {
            k: Staleness(samples=0, above=0, nominal=1.0 - self.coverage, p_value=1.0, alpha=self.alpha,
                         image_changed=m) for k, m in image_msgs.items()}
        # verdicts with today's image check
        out.update({k: replace(v, image_changed=image_msgs.get(k)) for k, v in carried.items()})
        out.update({k: replace(v, image_changed=image_msgs.get(k)) for k, v in judged.items()})
        # one gauge per container with a verdict (judged now or carried)
        self.telemetry.band_exceedance.clear()
        for r in everyone:
            st = out.get(r.key)
            if st is not None and st.samples:
                self.telemetry.band_exceedance.labels(
                    workload_namespace=r.namespace, workload=f"{kinds[(r.namespace, r.policy)]}/{r.workload}",
                    workload_container=r.container).set(st.ratio)
        stale = sum(1 for v in out.values() if v.stale)
        self.telemetry.models_stale.set(stale)
        if stale:
            log.warning("%d containers with a stale model (recent usage above the band); decreases held", stale)
        return out
