"""The simulation: pass by pass at simulated times, the live loop's decision with its state
carried from pass to pass.

Per pass at time T and per policy (in the live loop's order: namespace, name):

1. inputs as the live loop gathers them: each container's current request and limit
   (the pod template; for ``method: in-place`` what the pods run after earlier resizes),
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
gives the same result as the last one: a pass whose decisions are not kept, the same
inputs (requests, limits, rates, sizing answers) and the same history as the last pass,
that last pass changed nothing and left the history as it found it (a fixed point), and
none of its decisions waits on the clock or the budget (Settling, CoolingDown,
BudgetSpent, or HorizontalConflict over a decrease still settling). Every other way the clock enters a decision writes ``now`` into the history
(a new settle window, ``lastChange``), which the fixed-point test excludes. A skipped
pass still reads the budget as the decision would (the token bucket refills in the same
steps). ``simulate(..., shortcut=False)`` decides every pass and carries the history
through the status text; tests check both give the same replay.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
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
        containers={n: ContainerHistory(below_since=c.below_since.replace(microsecond=0), peak_m=c.peak_m)
                    if c.below_since is not None and c.peak_m is not None else ContainerHistory()
                    for n, c in h.containers.items()},
    )


#: reasons whose decision may flip with the clock or the budget alone
_TIMED = frozenset({Why.SETTLING, Why.COOLING_DOWN, Why.BUDGET_SPENT})


def _waits(d) -> bool:
    """True when this held decision may flip with the clock or the budget alone: a timed
    reason, or a HorizontalConflict hold over a decrease still settling (its settle window
    may end, or start afresh, with the clock — the hold hides the Settling reason)."""
    return d.why in _TIMED or (d.why is Why.HORIZONTAL_CONFLICT and d.settle.below_since is not None)


def _settled(wd: WorkloadDecision, history: WorkloadHistory) -> bool:
    """True when deciding again from the same inputs and ``history`` gives ``wd`` again
    in every part the replay uses (history, changes): nothing changed, the history is a
    fixed point, no decision waits on the clock or the budget."""
    return wd.history == history and all(
        d.verdict is not Verdict.CHANGED and not _waits(d) for d in wd.decisions)


def _utc(t: float) -> datetime:
    return datetime.fromtimestamp(t, tz=timezone.utc)


def _inputs(track: SizingTrack) -> list[tuple[float | None, Sizing | None]]:
    """(rate, sizing answer) at every pass as plain Python values, built once."""
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
) -> SimResult:
    """Run every pass. ``tracks`` is keyed by (policy key, container). ``as_written``
    keeps each policy's mode (a dry-run policy then changes nothing); otherwise every
    policy is simulated in apply mode. ``keep``: pass indices whose decisions are kept.
    ``shortcut=False``: decide every workload at every pass and carry the history through
    the status text, as the live loop does (the reference the skipping is tested against)."""
    order = sorted(targets, key=lambda t: (t.policy.namespace, t.policy.name))
    policies = [t.policy if as_written else dataclasses.replace(t.policy, mode=Mode.APPLY) for t in order]
    values: list[dict[str, tuple[int | None, int | None]]] = [dict(t.containers) for t in order]
    history: list[WorkloadHistory] = [WorkloadHistory() for _ in order]
    status: list[dict] = [{} for _ in order]  # what the live loop keeps in status.lastChange/settling
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
    #: inputs' parts of a settled last pass (None: the last pass was not settled)
    last_key: list[list | None] = [None for _ in order]
    last_given: list[WorkloadHistory | None] = [None for _ in order]
    given_hist = [carried(h) for h in history]  # the history as the next pass reads it
    track_rows = [[_inputs(tracks[(p.key, c.name)]) for c in p.containers] for p in policies]
    for t, p in zip(order, policies):
        for c in p.containers:
            res.steps[(p.workload_key, c.name)] = [(float(res.pass_times[0]), t.containers.get(c.name, (None, None))[0])]
    for i, now_s in enumerate(res.pass_times.tolist()):
        # rollouts still under way hold their slot (level-based, as the live loop syncs it)
        pending = [(eff, w) for eff, w in pending if eff > now_s]
        if bud.slots is not None:
            bud.slots.sync(policies[w].workload_key for _, w in pending)
        now = _utc(now_s)
        kept: list[WorkloadDecision] = []
        for w, p in enumerate(policies):
            vals = values[w]
            if shortcut:
                # what the inputs are built from: (request, limit) and (rate, sizing) per container
                key = [(vals.get(c.name), track[i]) for c, track in zip(p.containers, track_rows[w])]
                given = given_hist[w]
                if i not in keep_set and key == last_key[w] and given is last_given[w]:
                    # provably the same decision as the last pass (see the module doc): skip it,
                    # reading the budget as the decision would
                    if applies[w]:
                        bud.view(now_s)
                    continue
            inputs = []
            for c, track in zip(p.containers, track_rows[w]):
                if c.name not in vals:
                    continue  # not in the workload: decide holds it NoMetrics naming the container
                req, lim = vals[c.name]
                rate, sizing = track[i]
                inputs.append(ContainerInput(name=c.name, request_m=req, limit_m=lim, rate=rate, sizing=sizing))
            if not shortcut:
                # the live loop's decide stage, reading the history from the status the previous
                # pass wrote (lastChange, settling), drawing the budget the way the live pass does
                obs = Observed(obj=_policy_object(p, status[w]), policy=p, hpa_on_cpu=order[w].hpa_on_cpu,
                               inputs=tuple(inputs), conflict_with=order[w].conflict_with)
                wd = decider.decide_one(obs, None, obs.inputs, now, now_s)
                status[w] = history_to_status(wd.history, [{"name": n} for n in wd.history.containers])
            else:
                # the live loop's decide stage with the history given directly (no status text)
                wd = decider.decide_one(observed[w], None, inputs, now, now_s, history=given)
                settled = _settled(wd, given)
                last_key[w] = key if settled else None
                last_given[w] = given
                if not settled:
                    given_hist[w] = carried(wd.history)
            history_before = history[w]
            history[w] = given if shortcut and settled else wd.history
            if i in keep_set:
                kept.append(wd)
                res.states.setdefault(i, {})[p.key] = (history_before, tuple(inputs))
            changed = wd.changed
            if not changed:
                continue
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
        if i in keep_set:
            res.decisions[i] = kept
        if on_pass is not None:
            on_pass(i)
    return res

