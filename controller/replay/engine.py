"""One replay from its parts: history + targets + sizer → simulated passes → outcome.

:func:`run_replay` is what ``ratefit replay`` and the demo call. The steps:

1. pass times ``start, start + step, … ≤ end``; minutes (t − 60, t] inside [start, end];
2. per policy container its rate at every pass (:func:`series.workload_rates`: the
   policy's rateWindow and ratePercentile over the busiest pod, from samples up to each
   pass only) and the sizer's answer at that rate;
3. :func:`simulate.simulate` — the live loop's decision pass by pass;
4. per container and pod the usage per minute (:func:`series.pod_usage`), the three
   strategies' figures (:mod:`outcome`) and the nodes needed at each pass.

Pods belong to workloads by their names (the live loop's ``pod_names.PodAssigner``); the
request counter needs only ``namespace`` and ``pod`` labels. A policy with its own
``rateQuery`` cannot be evaluated from raw counters: its containers
have no rate (held NoMetrics, as the offline rate source answers) unless ``custom_rates``
supplies them (``ratefit replay --prometheus`` evaluates such queries on the server).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field

import numpy as np

from ratefit.controller.hpa_sizing import sizing_rate
from ratefit.controller.pod_names import PodAssigner, WorkloadRef
from ratefit.controller.policy import ResizeBy
from ratefit.controller.replay.history import History
from ratefit.controller.replay.inputs import Sizer, Targets
from ratefit.controller.replay.outcome import STRATEGIES, ContainerFigures, Outcome, container_figures, node_counts, step_values
from ratefit.controller.replay.replicas import AutoscaledFigures, autoscaled_figures, suggested_requests
from ratefit.controller.replay.series import MINUTE, PodUsage, pod_rate_grid, pod_usage, workload_rates
from ratefit.controller.replay.simulate import AutoscaledInputs, BudgetConfig, SimResult, SizingTrack, simulate
from ratefit.models.errors import InputError

__all__ = ["ReplayOptions", "ReplayResult", "run_replay", "pass_times"]


@dataclass(frozen=True)
class ReplayOptions:
    step_s: float = 300.0
    node_cpu: float = 8.0
    as_written: bool = False
    rollout_s: float = 120.0
    rate_interval_s: float = 120.0  # rate() interval of the default template (plan's --rate-interval)
    rate_step_s: float = 30.0  # subquery step of the percentile (plan's --rate-step)
    budget: BudgetConfig = BudgetConfig()


@dataclass
class ReplayResult:
    outcome: Outcome
    sim: SimResult
    tracks: Mapping[tuple[str, str], SizingTrack]
    minutes: np.ndarray
    #: (workload, container) → its pods' usage
    usage: dict[tuple[str, str], list[PodUsage]] = field(default_factory=dict)
    #: (workload, container) → (current_m, fixed_m)
    static: dict[tuple[str, str], tuple[int | None, float]] = field(default_factory=dict)


def pass_times(start: float, end: float, step_s: float) -> np.ndarray:
    if not (math.isfinite(start) and math.isfinite(end)) or end <= start:
        raise InputError(f"the replay window [{start}, {end}] is empty: the end must come after the start")
    if not step_s > 0:
        raise InputError(f"--step must be longer than 0s, got {step_s}")
    n = int(math.floor((end - start) / step_s + 1e-9)) + 1
    return start + step_s * np.arange(n, dtype=float)


def _minutes(start: float, end: float) -> np.ndarray:
    first = math.ceil((start + MINUTE) / MINUTE) * MINUTE
    if first > end:
        return np.zeros(0)
    return np.arange(first, end + 1e-9, MINUTE, dtype=float)


#: workloads from which an unlimited-budget replay is split over the CPUs
PARALLEL_FROM = 200


def _simulate(targets: Targets, tracks, times: np.ndarray, options: ReplayOptions, keep: tuple[int, ...],
              autoscaled: Mapping[str, AutoscaledInputs] | None = None) -> SimResult:
    """The passes. With no cluster budget (``--budget-per-minute 0 --max-rollouts 0``) no
    workload's decision depends on another's, so many workloads are split over the CPUs
    (forked processes, each simulating its share in the live order); the merged result is
    the same as one process gives. With a budget the workloads share it: one process."""
    import os

    cpus = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else (os.cpu_count() or 1)
    unlimited = options.budget.per_minute <= 0 and options.budget.max_rollouts <= 0
    if not unlimited or cpus < 2 or len(targets.targets) < PARALLEL_FROM:
        return simulate(targets.targets, tracks, times, as_written=options.as_written, rollout_s=options.rollout_s,
                        budget=options.budget, keep=keep, autoscaled=autoscaled)
    import multiprocessing as mp

    order = sorted(targets.targets, key=lambda t: (t.policy.namespace, t.policy.name))
    k = min(cpus, 4)
    ctx = mp.get_context("fork")  # the children inherit the inputs; only results travel back
    jobs = []
    for i in range(k):
        recv, send = ctx.Pipe(duplex=False)
        part = order[i::k]

        def work(part=part, send=send) -> None:
            try:
                send.send(simulate(part, tracks, times, as_written=options.as_written, rollout_s=options.rollout_s,
                                   budget=options.budget, keep=keep, autoscaled=autoscaled))
            except BaseException as exc:  # handed to the parent, which raises it
                send.send(exc)
            finally:
                send.close()

        proc = ctx.Process(target=work, daemon=True)
        proc.start()
        send.close()
        jobs.append((proc, recv))
    parts: list[SimResult] = []
    try:
        for proc, recv in jobs:
            got = recv.recv()
            if isinstance(got, BaseException):
                raise got
            parts.append(got)
    finally:
        for proc, recv in jobs:
            recv.close()
            proc.join(timeout=5)
            if proc.is_alive():
                proc.kill()  # by its own handle, never by name
                proc.join()
    merged = SimResult(pass_times=parts[0].pass_times)
    for r in parts:
        merged.changes.extend(r.changes)
        merged.steps.update(r.steps)
        for i, ds in r.decisions.items():
            merged.decisions.setdefault(i, []).extend(ds)
        for i, st in r.states.items():
            merged.states.setdefault(i, {}).update(st)
    rank = {t.policy.key: n for n, t in enumerate(order)}
    wrank = {t.policy.workload_key: n for n, t in enumerate(order)}
    merged.changes.sort(key=lambda c: (c.decided_at, wrank[c.workload]))
    for i in merged.decisions:
        merged.decisions[i].sort(key=lambda wd: rank[wd.policy])
    return merged


def run_replay(history: History, targets: Targets, sizer: Sizer, *, start: float, end: float,
               options: ReplayOptions = ReplayOptions(),
               custom_rates: Mapping[tuple[str, str], np.ndarray] | None = None,
               keep: tuple[int, ...] = (), progress: Callable[[str], None] | None = None) -> ReplayResult:
    say = progress or (lambda _m: None)
    times = pass_times(start, end, options.step_s)
    notes = list(targets.notes)
    tracks: dict[tuple[str, str], SizingTrack] = {}
    rate_cache: dict[tuple[str, str, float, float], np.ndarray] = {}
    # pods belong to workloads by their names, as the live loop assigns them
    assigner = PodAssigner(WorkloadRef(t.policy.namespace, t.policy.workload_kind, t.policy.workload_name)
                           for t in targets.targets)
    pods_of = history.pods_by_workload(assigner)
    autoscaled: dict[str, AutoscaledInputs] = {}
    for t in targets.targets:
        p = t.policy
        pods = pods_of.get((p.namespace, p.workload_kind, p.workload_name), [])
        counters = [history.requests.get((p.namespace, pod), ()) for pod in pods]
        scaled = _decision_autoscaler(t, counters, sizer, times, options)
        if scaled is not None:
            autoscaled[p.key] = scaled
        for c in p.containers:
            if c.rate_query is not None:
                rates = (custom_rates or {}).get((p.key, c.name))
                if rates is None:
                    rates = np.full(len(times), np.nan)
                    notes.append(f"{p.key}/{c.name} has its own rateQuery, which only a Prometheus can evaluate; "
                                 "held NoMetrics (replay with --prometheus)")
            else:
                ck = (p.namespace, p.workload_name, p.rate_window_s, p.rate_percentile)
                if ck not in rate_cache:
                    rate_cache[ck] = workload_rates(counters, times, window_s=p.rate_window_s,
                                                    quantile=p.rate_percentile / 100.0, step_s=options.rate_step_s,
                                                    interval_s=options.rate_interval_s)
                rates = rate_cache[ck]
            asked = rates
            if scaled is not None and scaled.view.rate_target is not None:
                # the observe stage asks the sizing API at the rate the autoscaler lets a pod reach
                f = scaled.facts.get(c.name)
                cap = f.capacity if f is not None else None
                asked = np.array([sizing_rate(scaled.view, r, capacity=cap) if math.isfinite(r) else math.nan
                                  for r in rates.tolist()])
            d, u, x = sizer.answers(c.model, asked)
            tracks[(p.key, c.name)] = SizingTrack(rate=rates, demand=d, upper=u, extrapolated=x)
    missing = sorted(getattr(sizer, "missing", ()))
    if missing:
        notes.append(f"no model for {', '.join(missing)}: held NoModel")
    say(f"rates and sizing answers ready for {len(tracks)} containers over {len(times)} passes")
    sim = _simulate(targets, tracks, times, options, keep, autoscaled)
    say(f"simulated {len(times)} passes: {len(sim.changes)} changes")
    minutes = _minutes(start, end)
    figs: list[ContainerFigures] = []
    usage: dict[tuple[str, str], list[PodUsage]] = {}
    static: dict[tuple[str, str], tuple[int | None, float]] = {}
    # per pod: containers' requests at each pass, for the node count
    pod_req = {s: [] for s in STRATEGIES}
    alive_rows = []
    k_pass = np.clip(np.searchsorted(minutes, times + 1e-9, side="left"), 0, max(len(minutes) - 1, 0))
    for t in targets.targets:
        p = t.policy
        wk = p.workload_key
        pods = pods_of.get((p.namespace, p.workload_kind, p.workload_name), [])
        pod_sizes = {s: np.zeros((len(pods), len(times)), dtype=np.int64) for s in STRATEGIES}
        pod_alive = np.zeros((len(pods), len(times)), dtype=bool)
        for cname, (req, _lim) in t.containers.items():
            steps = sim.steps.get((wk, cname), [(float(times[0]), req)])
            per_pod = []
            for j, pod in enumerate(pods):
                u = pod_usage(history.cpu.get((p.namespace, pod, cname), ()), minutes)
                per_pod.append(u if u is not None else PodUsage(first=0, cores=np.zeros(0, dtype=np.float32)))
            f = container_figures(wk, cname, per_pod, minutes, steps)
            figs.append(f)
            usage[(wk, cname)] = per_pod
            static[(wk, cname)] = (req, f.fixed_m)
            rf = step_values(steps, times)
            for j, u in enumerate(per_pod):
                if not len(u.cores):
                    continue
                live = (k_pass >= u.first) & (k_pass < u.stop)
                pod_alive[j] |= live
                pod_sizes["current"][j] += (req or 0)
                pod_sizes["fixed"][j] += int(math.ceil(f.fixed_m - 1e-9))
                pod_sizes["ratefit"][j] += rf
        alive_rows.append(pod_alive)
        for s in STRATEGIES:
            pod_req[s].append(pod_sizes[s])
    alive = np.concatenate(alive_rows) if alive_rows else np.zeros((0, len(times)), dtype=bool)
    reqs = {s: (np.concatenate(v) if v else np.zeros((0, len(times)), dtype=np.int64)) for s, v in pod_req.items()}
    nodes = node_counts(reqs, alive, int(round(options.node_cpu * 1000)))
    changes: dict[str, dict[str, int]] = {t.policy.workload_key: {"changes": 0, "rollouts": 0, "resizes": 0}
                                          for t in targets.targets}
    for ch in sim.changes:
        c = changes[ch.workload]
        c["changes"] += 1
        c["resizes" if ch.method is ResizeBy.IN_PLACE else "rollouts"] += 1
    scaled = [_autoscaled(t, history, pods_of, sizer, sim, tracks, times, figs, options, notes)
              for t in targets.targets if t.autoscaler is not None and t.autoscaler.cpu is not None
              and t.conflict_with is None]
    outcome = Outcome(start=start, end=end, step_s=options.step_s, node_cpu=options.node_cpu, containers=figs,
                      changes=changes, nodes=nodes, notes=notes, autoscaled=[a for a in scaled if a is not None])
    return ReplayResult(outcome=outcome, sim=sim, tracks=tracks, minutes=minutes, usage=usage, static=static)


def _decision_autoscaler(t, counters, sizer: Sizer, times: np.ndarray,
                         options: ReplayOptions) -> AutoscaledInputs | None:
    """What the policy's decisions see of its workload's autoscaler, when it changes them:
    a per-pod rate target (the sizing rate), or a CPU-utilisation one the policy may act
    against (``allowHorizontalConflict``: the coupled answer is the target). A held
    HorizontalConflict gets nothing here: the autoscaler would only add words to its
    message, and each coupled answer costs milliseconds. Replicas: the pods the history
    shows with a rate at each pass (their per-pod rates are what the decision reads)."""
    view = t.autoscaler
    if view is None or t.conflict_with is not None:
        return None
    if view.rate_target is None and not (view.cpu is not None and t.hpa_on_cpu and t.policy.allow_horizontal_conflict):
        return None
    running = np.zeros(len(times), dtype=np.int64)
    for c in counters:
        running += np.isfinite(pod_rate_grid(c, times, interval_s=options.rate_interval_s))
    replicas = np.where(running > 0, running, max(view.replicas, 1))
    facts_of = getattr(sizer, "facts", None)
    facts = {c.name: facts_of(c.model) if facts_of is not None else None for c in t.policy.containers}
    return AutoscaledInputs(view=view, replicas=replicas, facts=facts)


def _autoscaled(t, history: History, pods_of, sizer: Sizer, sim: SimResult, tracks, times: np.ndarray,
                figs: list[ContainerFigures], options: ReplayOptions, notes: list[str]) -> AutoscaledFigures | None:
    """Replicas and reserved CPU of one workload under its CPU-utilisation autoscaler, per
    strategy (``controller.replay.replicas``)."""
    p = t.policy
    view = t.autoscaler
    wk = p.workload_key
    measured = [c for c in p.containers if c.name in t.containers
                and (view.cpu.container is None or view.cpu.container == c.name)]
    left = [n for n in t.containers if n not in {c.name for c in p.containers}]
    if view.cpu.container is None and left:
        notes.append(f"{wk}: the autoscaler measures container(s) {', '.join(left)} too, which the policy does not "
                     "size; the simulated replicas leave them out")
    if not measured:
        return None
    pods = pods_of.get((p.namespace, p.workload_kind, p.workload_name), [])
    total = np.zeros(len(times))
    seen = np.zeros(len(times), dtype=bool)
    for pod in pods:
        r = pod_rate_grid(history.requests.get((p.namespace, pod), ()), times, interval_s=options.rate_interval_s)
        ok = np.isfinite(r)
        total[ok] += r[ok]
        seen |= ok
    total[~seen] = np.nan

    def demand_at(rates: np.ndarray) -> np.ndarray:
        out = np.zeros(len(rates))
        for c in measured:
            out += sizer.answers(c.model, rates)[0]
        return out

    fixed = {f.container: f.fixed_m for f in figs if f.workload == wk}
    requests = {
        "current": {c.name: np.full(len(times), float(t.containers[c.name][0] or 0)) for c in measured},
        "fixed": {c.name: np.full(len(times), float(math.ceil(fixed.get(c.name, 0.0) - 1e-9))) for c in measured},
        "ratefit": {c.name: step_values(sim.steps.get((wk, c.name), [(float(times[0]), t.containers[c.name][0])]),
                                        times).astype(float) for c in measured},
    }
    figures = autoscaled_figures(wk, view, containers=[c.name for c in measured], total_rate=total,
                                 demand_at=demand_at, requests_m=requests, step_s=options.step_s)
    facts_of = getattr(sizer, "facts", None)
    if facts_of is None:
        notes.append(f"{wk}: no suggested size under the autoscaler (it needs the model store: --store)")
        return figures
    sug = suggested_requests(view, [c.name for c in measured], {c.name: tracks[(p.key, c.name)].rate for c in measured},
                             {c.name: facts_of(c.model) for c in measured},
                             {c.name: t.containers[c.name][0] for c in measured},
                             figures.replicas["current"], times)
    requests["suggested"] = {c: np.where(np.isfinite(v), v, requests["ratefit"][c]) for c, v in sug.items()}
    both = autoscaled_figures(wk, view, containers=[c.name for c in measured], total_rate=total, demand_at=demand_at,
                              requests_m={"suggested": requests["suggested"]}, step_s=options.step_s)
    figures.replicas["suggested"] = both.replicas["suggested"]  # type: ignore[index]
    figures.request_m["suggested"] = both.request_m["suggested"]  # type: ignore[index]
    return figures
