"""The simulation: pass by pass at simulated times, the live loop's decision with its state
carried from pass to pass.

Per pass at time T and per policy (in the live loop's order: namespace, name):

1. inputs as the live loop gathers them: each container's current request and limit
   (the pod template; for ``resizeBy: InPlace`` what the pods run after earlier resizes),
   the rate at T (:mod:`controller.replay.series`, from samples up to T only) and the
   sizing answer at that rate;
2. the decision by the live loop's decide stage (``controller.stages.decide.Decider.
   decide_one`` over ``controller.decide.decide_workload`` — never a copy), given the
   history (``lastChange``, settling) the previous pass left, as the status would carry it
   (:func:`carried`: whole seconds, only complete settling records — what
   ``policy.history_to_status`` then ``history_from_status`` give, without the text round
   trip), and drawing the cluster budget (``controller.limits.Budget``: changes per minute, concurrent rollouts) as the
   live pass does;
3. a changed workload takes its new requests at once for an in-place resize and after
   ``rollout_s`` for a rollout; the rollout holds a rollout slot until then.

Simplifications (said here so a reader of the numbers knows them): a rollout changes every
pod of the workload at once when it completes (the history's pod names stay as they are);
an in-place resize reaches every pod, also pods started later (the live loop re-applies
it each pass); the API server accepts every change (no Rejected).

Rates, sizing answers and usage do not depend on the decisions, so they are computed
once up front (vectorised); only the decisions run pass by pass.

A pass is skipped for a workload (its decision is not recomputed) only when it provably
gives the same result as its last decision: a pass whose decisions are not kept, the same
inputs as that decision (requests and limits; whether the rate is usable; the sizing
answer — the rate's value itself only reaches the decision's ``rate`` field and messages,
which a skipped pass never shows: :func:`input_changes`, vectorised), and that decision
changed nothing and left the history as it found it (a fixed point). A fixed point that
waits on the clock is decided again from one second before its hold may end
(:func:`_wake`: Settling and a HorizontalConflict hold over a settling decrease at the
settle window's end, CoolingDown at the cooldown's end); one held BudgetSpent is decided
again at the first pass whose budget, read at its turn in the pass order, no longer
refuses (while it refuses, the decision is the same hold); every decision that moved the
history is decided again at the next pass. Every other way the clock
enters a decision writes ``now`` into the history, which the fixed-point test excludes.
The token bucket refills to the pass's time once per pass, as the first decision reading
it would (later reads at the same time change nothing). ``simulate(..., shortcut=False)``
decides every pass and carries the history through the status text; tests check both
give the same replay (``tests/test_replay_shortcut.py``, ``tests/test_replay_plan.py``).
"""

from __future__ import annotations

import dataclasses
import heapq
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any
from datetime import datetime, timezone

import numpy as np

from ratefit.controller.decide import ContainerInput, Sizing, Verdict, WorkloadDecision, Why
from ratefit.controller.limits import Budget, RolloutSlots, TokenBucket
from ratefit.controller.policy import (
    ContainerHistory,
    Mode,
    Policy,
    ResizeBy,
    WorkloadHistory,
    history_to_status,
)
from ratefit.controller.stages.decide import Decider
from ratefit.controller.stages.observe import Observed
from ratefit.controller.workload import PolicyObject

__all__ = [
    "ReplayTarget",
    "AutoscaledInputs",
    "SizingTrack",
    "Change",
    "BudgetConfig",
    "SimResult",
    "simulate",
]


@dataclass(frozen=True)
class ReplayTarget:
    """One policy and the workload it sizes, as the replay starts from them."""

    policy: Policy
    #: container → (request_m, limit_m) of the workload's pod template today
    containers: Mapping[str, tuple[int | None, int | None]]
    hpa_on_cpu: bool = False
    #: ``namespace/name`` of an older SizingPolicy naming the same workload: this one is
    #: held PolicyConflict and draws nothing from the budget, as in the live loop
    #: (``controller.stages.observe.conflicts``)
    conflict_with: str | None = None
    #: the workload's horizontal autoscaler as ``hpa_sizing.autoscaler_view`` sees it (None:
    #: none). The replay simulates the replicas of one on CPU utilisation
    #: (``controller.replay.replicas``); the decisions still see only ``hpa_on_cpu``
    autoscaler: Any = None


@dataclass(frozen=True)
class AutoscaledInputs:
    """What a policy's decisions see of its workload's horizontal autoscaler at every pass:
    the view (``hpa_sizing.autoscaler_view``) with ``replicas[i]`` pods running — the pods
    the history shows at the pass, whose per-pod rates the decision reads — and per
    container the model's facts (trained range, capacity, curve points)."""

    view: Any  # hpa_sizing.AutoscalerView
    replicas: np.ndarray  # int, one per pass
    facts: Mapping[str, Any] = field(default_factory=dict)  # container → hpa_sizing.ModelFacts | None

    def at(self, i: int) -> Any:
        n = int(self.replicas[i])
        return self.view if n == self.view.replicas else dataclasses.replace(self.view, replicas=n)


@dataclass(frozen=True)
class SizingTrack:
    """One container's inputs at every pass: rate (NaN: none) and the sizing answer in
    cores (NaN: no answer) with the extrapolated flag."""

    rate: np.ndarray
    demand: np.ndarray
    upper: np.ndarray
    extrapolated: np.ndarray


@dataclass(frozen=True)
class Change:
    """One applied change of one workload."""

    workload: str
    decided_at: float  # unix s (the pass)
    effective_at: float  # unix s (at once for in-place, after the rollout delay otherwise)
    method: ResizeBy
    #: container → (old request, new request, old limit, new limit), millicores
    containers: Mapping[str, tuple[int | None, int | None, int | None, int | None]]
    why: str


@dataclass(frozen=True)
class BudgetConfig:
    """The cluster budget of ``ratefit run`` (0: unlimited), same defaults."""

    per_minute: float = 2.0
    max_rollouts: int = 1

    def build(self, now: float) -> Budget:
        return Budget(
            bucket=TokenBucket.per_minute(self.per_minute, now=now) if self.per_minute > 0 else None,
            slots=RolloutSlots(self.max_rollouts) if self.max_rollouts > 0 else None,
        )


@dataclass
class SimResult:
    pass_times: np.ndarray
    changes: list[Change] = field(default_factory=list)
    #: (workload key, container) → [(effective time, request_m)], starting with today's value
    steps: dict[tuple[str, str], list[tuple[float, int | None]]] = field(default_factory=dict)
    #: pass index → decisions of that pass (only the passes asked for in ``keep``)
    decisions: dict[int, list[WorkloadDecision]] = field(default_factory=dict)
    #: pass index → policy key → (history, inputs) the decision started from (``keep`` only)
    states: dict[int, dict[str, tuple[WorkloadHistory, tuple[ContainerInput, ...]]]] = field(default_factory=dict)


def _policy_object(p: Policy, status: dict) -> PolicyObject:
    return PolicyObject(namespace=p.namespace, name=p.name, uid="", generation=p.generation or 0,
                        resource_version="", spec={}, status=status)


def carried(h: WorkloadHistory) -> WorkloadHistory:
    """``h`` as the next decision reads it back from the status (``history_to_status`` then
    ``history_from_status``): times at whole seconds, a settling record without both fields
    read as none (the decision asks ``history.container(name)``, which answers an empty
    record for a missing one). Returns ``h`` itself when nothing changes (the usual case:
    passes at whole seconds)."""
    last = h.last_change
    if (last is None or not last.microsecond) and all(
            (c.below_since is None and c.peak_m is None)
            or (c.below_since is not None and c.peak_m is not None and not c.below_since.microsecond)
            for c in h.containers.values()):
        return h
    return WorkloadHistory(
        last_change=None if last is None else last.replace(microsecond=0),
        containers={n: ContainerHistory(below_since=c.below_since.replace(microsecond=0), peak_m=c.peak_m,
                                        proposed_m=c.proposed_m)
                    if c.below_since is not None and c.peak_m is not None else ContainerHistory(proposed_m=c.proposed_m)
                    for n, c in h.containers.items()},
    )


def _utc(t: float) -> datetime:
    return datetime.fromtimestamp(t, tz=timezone.utc)


def _inputs(track: SizingTrack) -> list[tuple[float | None, Sizing | None]]:
    """(rate, sizing answer) at every pass as plain Python values, built once (the
    straightforward path)."""
    out: list[tuple[float | None, Sizing | None]] = []
    last: Sizing | None = None
    for r, d, u, x in zip(track.rate.tolist(), track.demand.tolist(), track.upper.tolist(),
                          track.extrapolated.tolist()):
        if not math.isfinite(r):
            out.append((None, None))
        elif not math.isfinite(d):
            out.append((r, None))
        else:
            if last is None or (last.demand, last.upper, last.extrapolated) != (d, u, bool(x)):
                last = Sizing(demand=d, upper=u, extrapolated=bool(x))
            out.append((r, last))
    return out


def _one_input(name: str, req: int | None, lim: int | None, r: float, d: float, u: float, x: bool,
               facts: Any = None) -> ContainerInput:
    """One container's input at one pass, as :func:`_inputs` builds it."""
    if not math.isfinite(r):
        return ContainerInput(name=name, request_m=req, limit_m=lim, rate=None, sizing=None, facts=facts)
    if not math.isfinite(d):
        return ContainerInput(name=name, request_m=req, limit_m=lim, rate=r, sizing=None, facts=facts)
    return ContainerInput(name=name, request_m=req, limit_m=lim, rate=r,
                          sizing=Sizing(demand=d, upper=u, extrapolated=bool(x)), facts=facts)


def _same(a: np.ndarray) -> np.ndarray:
    """Per pass i ≥ 1: a[i] equals a[i − 1] (NaN equals NaN); pass 0: False."""
    out = np.zeros(len(a), dtype=bool)
    if len(a) > 1:
        prev, cur = a[:-1], a[1:]
        eq = cur == prev
        if a.dtype.kind == "f":
            eq |= np.isnan(cur) & np.isnan(prev)
        out[1:] = eq
    return out


def input_changes(track: SizingTrack, *, with_rate: bool) -> np.ndarray:
    """Per pass: True where this container's input to the decision may differ from the
    pass before (pass 0: True). The decision reads the rate only to see whether it is
    usable (finite, not negative) — its value goes into the decision's ``rate`` field and
    messages, which a skipped pass never shows — and the sizing answer (demand, upper,
    extrapolated) only when the rate is usable and the demand finite. ``with_rate``: the
    rate's value counts too (an autoscaler reads it)."""
    rate = np.asarray(track.rate, dtype=float)
    with np.errstate(invalid="ignore"):
        usable = np.isfinite(rate) & (rate >= 0)
    sized = usable & np.isfinite(track.demand)
    same = _same(usable) & _same(sized)
    same &= _same(np.where(sized, track.demand, 0.0)) & _same(np.where(sized, track.upper, 0.0))
    same &= _same(np.where(sized, np.asarray(track.extrapolated, dtype=bool), False))
    if with_rate:
        same &= _same(rate)
    return ~same


def _wake(wd: WorkloadDecision, given: WorkloadHistory, p: Policy) -> tuple[float | None, bool]:
    """When deciding again from the same inputs may give something else, and whether it
    waits on the budget. Time: None — at the next pass (a change, or the history moved);
    +inf — never by the clock (a fixed point); else the time (unix s) a timed hold may
    end: a decrease's settle window (Settling, or HorizontalConflict over a settling
    decrease) or the cooldown — one second early on purpose: deciding a pass too many is
    always safe. Budget: True for a BudgetSpent fixed point — it decides the same while the
    budget, read at its turn in the pass, still refuses (the refusal only words its message)."""
    if wd.history != given:
        return None, False
    wake = math.inf
    budget = False
    for d in wd.decisions:
        if d.verdict is Verdict.CHANGED:
            return None, False
        if d.why is Why.BUDGET_SPENT:
            budget = True
        elif d.why is Why.SETTLING or (d.why is Why.HORIZONTAL_CONFLICT and d.settle.below_since is not None):
            since = d.settle.below_since
            if since is None:
                return None, False
            wake = min(wake, since.timestamp() + p.settle_s - 1.0)
        elif d.why is Why.COOLING_DOWN:
            if given.last_change is None:
                return None, False
            wake = min(wake, given.last_change.timestamp() + p.cooldown_s - 1.0)
    return wake, budget


def simulate(
    targets: Sequence[ReplayTarget],
    tracks: Mapping[tuple[str, str], SizingTrack],
    pass_times: np.ndarray,
    *,
    as_written: bool = False,
    rollout_s: float = 120.0,
    budget: BudgetConfig = BudgetConfig(),
    keep: Sequence[int] = (),
    on_pass: Callable[[int], None] | None = None,
    shortcut: bool = True,
    autoscaled: Mapping[str, AutoscaledInputs] | None = None,
) -> SimResult:
    """Run every pass. ``tracks`` is keyed by (policy key, container). ``as_written``
    keeps each policy's mode (a dry-run policy then changes nothing); otherwise every
    policy is simulated in apply mode. ``keep``: pass indices whose decisions are kept.
    ``shortcut=False``: decide every workload at every pass and carry the history through
    the status text, as the live loop does (the reference the skipping is tested against).
    ``autoscaled``: policy key → what its decisions see of the workload's autoscaler
    (:class:`AutoscaledInputs`), as the observe stage hands it to the decide stage."""
    order = sorted(targets, key=lambda t: (t.policy.namespace, t.policy.name))
    policies = [t.policy if as_written else dataclasses.replace(t.policy, mode=Mode.APPLY) for t in order]
    values: list[dict[str, tuple[int | None, int | None]]] = [dict(t.containers) for t in order]
    history: list[WorkloadHistory] = [WorkloadHistory() for _ in order]
    pending: list[tuple[float, int]] = []  # rollouts in flight: (done at, workload index)
    keep_set = set(keep)
    res = SimResult(pass_times=np.asarray(pass_times, dtype=float))
    if len(res.pass_times) == 0:
        return res
    bud = budget.build(float(res.pass_times[0]))
    decider = Decider(budget=bud, monotonic=lambda: 0.0, dry_run=False, write=True)
    observed = [Observed(obj=_policy_object(p, {}), policy=p, hpa_on_cpu=t.hpa_on_cpu, conflict_with=t.conflict_with)
                for t, p in zip(order, policies)]
    # a policy held PolicyConflict never reads the budget (decide_one returns before)
    applies = [decider.applies(o) and o.conflict_with is None for o in observed]
    scaled = [(autoscaled or {}).get(p.key) for p in policies]
    for t, p in zip(order, policies):
        for c in p.containers:
            res.steps[(p.workload_key, c.name)] = [(float(res.pass_times[0]), t.containers.get(c.name, (None, None))[0])]

    def record(i: int, now_s: float, w: int, wd: WorkloadDecision, inputs: list[ContainerInput],
               history_before: WorkloadHistory, kept: list[WorkloadDecision]) -> None:
        """Keep the decision (``keep`` passes) and carry out its change."""
        p = policies[w]
        if i in keep_set:
            kept.append(wd)
            res.states.setdefault(i, {})[p.key] = (history_before, tuple(inputs))
        changed = wd.changed
        if not changed:
            return
        new = {d.container: (d.proposed_m, d.proposed_limit_m) for d in changed}
        old = {d.container: (d.current_m, d.limit_m) for d in changed}
        in_place = p.resize_by is ResizeBy.IN_PLACE
        eff = now_s if in_place else now_s + rollout_s
        # the next pass reads the patched template (rollout) or the resized pods (in-place);
        # the pods run the new request from ``eff`` on
        values[w].update(new)
        if not in_place:
            pending.append((eff, w))
        res.changes.append(Change(
            workload=p.workload_key, decided_at=now_s, effective_at=eff, method=p.resize_by,
            containers={c: (old[c][0], new[c][0], old[c][1], new[c][1]) for c in new},
            why=",".join(sorted({d.why.value for d in changed})),
        ))
        for c, (req, _lim) in new.items():
            res.steps[(p.workload_key, c)].append((eff, req))

    def sync_rollouts(now_s: float) -> None:
        # rollouts still under way hold their slot (level-based, as the live loop syncs it)
        nonlocal pending
        pending = [(eff, w) for eff, w in pending if eff > now_s]
        if bud.slots is not None:
            bud.slots.sync(policies[w].workload_key for _, w in pending)

    if not shortcut:
        status: list[dict] = [{} for _ in order]  # what the live loop keeps in status.lastChange/settling
        track_rows = [[_inputs(tracks[(p.key, c.name)]) for c in p.containers] for p in policies]
        for i, now_s in enumerate(res.pass_times.tolist()):
            sync_rollouts(now_s)
            now = _utc(now_s)
            kept: list[WorkloadDecision] = []
            for w, p in enumerate(policies):
                vals = values[w]
                inputs = []
                for c, track in zip(p.containers, track_rows[w]):
                    if c.name not in vals:
                        continue  # not in the workload: decide holds it NoMetrics naming the container
                    req, lim = vals[c.name]
                    rate, sizing = track[i]
                    inputs.append(ContainerInput(name=c.name, request_m=req, limit_m=lim, rate=rate, sizing=sizing,
                                                 facts=scaled[w].facts.get(c.name) if scaled[w] else None))
                # the live loop's decide stage, reading the history from the status the previous
                # pass wrote (lastChange, settling), drawing the budget the way the live pass does
                obs = Observed(obj=_policy_object(p, status[w]), policy=p, hpa_on_cpu=order[w].hpa_on_cpu,
                               inputs=tuple(inputs), conflict_with=order[w].conflict_with,
                               autoscaler=scaled[w].at(i) if scaled[w] else None)
                wd = decider.decide_one(obs, None, obs.inputs, now, now_s)
                # the rows the live record stage writes (verdict, newRequest: a DryRun proposal
                # the next decision reads back), with the history's settling fields
                rows = [d.to_status() for d in wd.decisions]
                rows += [{"name": n} for n in wd.history.containers if n not in {d.container for d in wd.decisions}]
                status[w] = history_to_status(wd.history, rows)
                history_before = history[w]
                history[w] = wd.history
                record(i, now_s, w, wd, inputs, history_before, kept)
            if i in keep_set:
                res.decisions[i] = kept
            if on_pass is not None:
                on_pass(i)
        return res

    # The shortcut: a workload is decided at a pass only when one of its inputs may have
    # changed since its last decision, when that decision was not a fixed point, or when a
    # timed hold it made may end (:func:`_wake`); every pass of ``keep``. Passes in between
    # provably give the same decision (module doc) and are skipped.
    n = len(res.pass_times)
    moved = np.zeros((n, len(policies)), dtype=bool)
    columns: list[list[tuple[str, list, list, list, list, Any]]] = []
    for w, p in enumerate(policies):
        cols = []
        for c in p.containers:
            tr = tracks[(p.key, c.name)]
            # under an autoscaler the rate's value is an input (the coupled answer, the replicas it implies)
            moved[:, w] |= input_changes(tr, with_rate=scaled[w] is not None)
            cols.append((c.name, tr.rate.tolist(), tr.demand.tolist(), tr.upper.tolist(), tr.extrapolated.tolist(),
                         scaled[w].facts.get(c.name) if scaled[w] else None))
        if scaled[w] is not None:
            moved[:, w] |= ~_same(np.asarray(scaled[w].replicas))
        columns.append(cols)
    given_hist = [carried(h) for h in history]  # the history as the next pass reads it
    version = [0] * len(policies)
    wakes: list[tuple[float, int, int]] = []  # (time, workload, version) of timed holds and unsettled passes
    reads_budget = any(applies)
    everyone = list(range(len(policies)))
    on_budget: set[int] = set()  # BudgetSpent fixed points: decided again when the budget lets them
    for i, now_s in enumerate(res.pass_times.tolist()):
        sync_rollouts(now_s)
        if reads_budget:
            # the token bucket refills to ``now`` at the first decision that reads it in a pass
            # (later reads at the same time change nothing): once here, as every pass of the
            # straightforward replay does
            bud.view(now_s)
        if i in keep_set:
            picked: set[int] = set(everyone)
            due: Sequence[int] = everyone
            refused = False
            wakes.clear()
        else:
            picked = set(np.flatnonzero(moved[i]).tolist())
            while wakes and wakes[0][0] <= now_s:
                _t, w, v = heapq.heappop(wakes)
                if v == version[w]:
                    picked.add(w)
            # within a pass the budget only shrinks (tokens taken, slots acquired; the refill and
            # the slots' sync happen at its start), so a refusal now holds for the whole pass
            refused = bool(on_budget) and bud.view(now_s).refusal() is not None
            due = sorted(picked | on_budget) if on_budget and not refused else sorted(picked)
        now = _utc(now_s)
        kept = []
        for w in due:
            if w not in picked:
                if refused or bud.view(now_s).refusal() is not None:
                    refused = True
                    continue  # held BudgetSpent again: the budget still refuses at its turn
            on_budget.discard(w)
            p = policies[w]
            vals = values[w]
            inputs = [_one_input(name, *vals[name], r[i], d[i], u[i], x[i], f)
                      for name, r, d, u, x, f in columns[w] if name in vals]
            given = given_hist[w]
            obs = observed[w] if scaled[w] is None else dataclasses.replace(observed[w], autoscaler=scaled[w].at(i))
            # the live loop's decide stage with the history given directly (no status text)
            wd = decider.decide_one(obs, None, inputs, now, now_s, history=given)
            wake, budget_wait = _wake(wd, given, p)
            version[w] += 1
            if budget_wait:
                on_budget.add(w)
            if wake is None:
                heapq.heappush(wakes, (now_s, w, version[w]))  # decided again at the next pass
            elif wake < math.inf:
                heapq.heappush(wakes, (wake, w, version[w]))
            fixed = wd.history == given
            history_before = history[w]
            if fixed:
                history[w] = given
            else:
                history[w] = wd.history
                given_hist[w] = carried(wd.history)
            record(i, now_s, w, wd, inputs, history_before, kept)
        if i in keep_set:
            res.decisions[i] = kept
        if on_pass is not None:
            on_pass(i)
    return res
