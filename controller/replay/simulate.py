"""The simulation: pass by pass at simulated times, the live loop's decision with its state
carried from pass to pass.

Per pass at time T and per policy (in the live loop's order: namespace, name):

1. inputs as the live loop gathers them: each container's current request and limit
   (the pod template; for ``method: in-place`` what the pods run after earlier resizes),
   the rate at T (:mod:`controller.replay.series`, from samples up to T only) and the
   sizing answer at that rate;
2. the decision by the live loop's decide stage (``controller.stages.decide.Decider.
   decide_one`` over ``controller.decide.decide_workload`` — never a copy), reading the
   history (``lastChange``, settling) from the status the previous pass left
   (``policy.history_to_status``, as the record stage writes it), and drawing the cluster
   budget (``controller.limits.Budget``: changes per minute, concurrent rollouts) as the
   live pass does;
3. a changed workload takes its new requests at once for an in-place resize and after
   ``rollout_s`` for a rollout; the rollout holds a rollout slot until then.

Simplifications (said here so a reader of the numbers knows them): a rollout changes every
pod of the workload at once when it completes (the history's pod names stay as they are);
an in-place resize reaches every pod, also pods started later (the live loop re-applies
it each pass); the API server accepts every change (no Rejected).

Rates, sizing answers and usage do not depend on the decisions, so they are computed
once up front (vectorised); only the decisions run pass by pass.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime, timezone

import numpy as np

from ratefit.controller.decide import ContainerInput, Sizing, WorkloadDecision
from ratefit.controller.limits import Budget, RolloutSlots, TokenBucket
from ratefit.controller.policy import Mode, Policy, ResizeBy, WorkloadHistory, history_to_status
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
) -> SimResult:
    """Run every pass. ``tracks`` is keyed by (policy key, container). ``as_written``
    keeps each policy's mode (a dry-run policy then changes nothing); otherwise every
    policy is simulated in apply mode. ``keep``: pass indices whose decisions are kept."""
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
            inputs = []
            for c, track in zip(p.containers, track_rows[w]):
                if c.name not in values[w]:
                    continue  # not in the workload: decide holds it NoMetrics naming the container
                req, lim = values[w][c.name]
                rate, sizing = track[i]
                inputs.append(ContainerInput(name=c.name, request_m=req, limit_m=lim, rate=rate, sizing=sizing))
            # the live loop's decide stage, reading the history from the status the previous
            # pass wrote (lastChange, settling), drawing the budget the way the live pass does
            obs = Observed(obj=_policy_object(p, status[w]), policy=p, hpa_on_cpu=order[w].hpa_on_cpu,
                           inputs=tuple(inputs))
            wd = decider.decide_one(obs, None, obs.inputs, now, now_s)
            history_before = history[w]
            history[w] = wd.history
            status[w] = history_to_status(wd.history, [{"name": n} for n in wd.history.containers])
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

