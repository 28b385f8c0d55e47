"""The decision (DESIGN.md, "One decision") as pure functions of plain values.

Inputs: the container's current request and limit (millicores, None if unset), the
per-pod request rate at the policy's percentile, demand and upper band from the
sizing API (cores, with the ``extrapolated`` flag), the policy, the history kept in
the policy's status, the clock (``now``, an aware datetime) and a snapshot of the
global budget. Output: one frozen :class:`Decision` per container, gathered in a
:class:`WorkloadDecision`. Nothing here reads a clock, a file or the network.

The steps, in order (the first that stops a change names the ``why``):

1. rate: ``ratePercentile`` of the per-pod rates (:func:`rate_percentile`,
   linear interpolation = Hyndman & Fan type 7 = numpy's default ``'linear'``).
   No usable rate → held **NoMetrics**. No sizing answer → held **NoModel**.
   The API extrapolated beyond the trained range → held **Extrapolated**, unless
   the policy sets ``allowExtrapolation: true`` (then it goes on, flagged
   ``extrapolated`` in the proposal).
2. target = demand bound (upper) × (1 + headroomPercent/100), clamped to [floor, ceiling], rounded up to a
   multiple of 5m (a ceiling that is not a multiple of 5 still wins). With
   ``cpuLimit: Keep`` the target never exceeds the kept limit.
3. Deadband: held **InsideDeadband** unless |target − current| > deadband × current
   and ≥ 10m. If the target sits on a bound the why is **AtFloor**, **AtCeiling**
   or **AtLimit** instead (the model wants more/less than the policy allows).
4. Increases go at once. Decreases wait until the target has stayed below the
   current request for ``settle`` (status ``containers[].belowSinceTime``): held
   **Settling** meanwhile. A decrease then goes to the *highest* target seen while
   settling (``containers[].peakTarget``), never to one low reading. If that highest target is
   still inside the deadband, the settle window starts afresh at this pass (held
   InsideDeadband), so a slowly falling load is followed down one settle period at a time.
5. Step limit: at most ×up, at least ×down per change (up = 1 + maxIncreasePercent/100,
   down = 1 − maxDecreasePercent/100). A cut-short change is still
   a change: verdict Changed (Proposed in DryRun), why **StepLimited**. A
   step-limited decrease keeps its settling record, so the next step waits only
   for the cooldown.
6. Workload gates (one patch per workload): a CPU-utilisation horizontal
   autoscaler → held **HorizontalConflict** unless ``allowHorizontalConflict``;
   ``resizeBy: InPlace`` where the change would need removing a limit, adding a
   first request, or would change the QoS class → held **InPlaceUnsupported**;
   cooldown since ``status.lastChangeTime`` → held **CoolingDown** (increases too: the
   cooldown bounds rollouts); in apply mode the global budget (changes per minute,
   concurrent rollouts) → held **BudgetSpent**. Dry-run policies never draw from
   nor wait for the budget.
   With the workload's autoscaler (``autoscaler=``, ``controller/hpa_sizing``): on a
   per-pod request rate the sizing answer was asked at the rate the autoscaler lets a
   pod reach (observe stage) and the message says "sized for the autoscaler's target
   T req/s per pod" — no conflict; on CPU utilisation the HorizontalConflict message
   carries the coupled answer (request, replicas, reserved CPU), and with
   ``allowHorizontalConflict`` that request is the target (no headroom: the
   autoscaler's utilisation target is the slack). Every decision reports reserved
   cores per 100 req/s now and at the suggested size.
7. Limits (``cpuLimit``): ``KeepRatio`` scales the limit by the request's factor (rounded up to
   1m, never below the request); ``Keep`` leaves it; ``Drop`` removes it, together
   with the next request change (a limit alone never starts a rollout).
8. Verdict: **Changed** (Apply mode), **Proposed** (DryRun, where Apply would say
   Changed), **Held**. A DryRun proposal already in the status stands while the new
   value stays within its deadband (same side of the current request): proposals and
   their Events do not follow every small move of the rates. A change that reaches its
   full target says **NewTarget** (or the bound it sits on: AtFloor/AtCeiling/AtLimit).

**Rejected** is set by reconcile through :meth:`WorkloadDecision.rejected` when the
API server refuses the change (server-side dry-run or patch, e.g. 422).

A container without a request but with a limit is treated as requesting its
limit: the API server defaults requests to limits (Kubernetes docs, "Resource
Management for Pods and Containers").
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace
from datetime import datetime
from enum import StrEnum
from typing import Any

from ratefit.controller.hpa_sizing import AutoscalerHint, AutoscalerView, ModelFacts, autoscaler_hint, cores_per_100
from ratefit.controller.limits import BudgetView, Cooldown, round_up, step_limit
from ratefit.controller.policy import (
    ContainerHistory,
    ResizeBy,
    ContainerRule,
    CpuLimit,
    Mode,
    Policy,
    WorkloadHistory,
)
from ratefit.controller.quantity import format_cpu
from ratefit.controller.staleness import Staleness


def _mc(m: int) -> str:
    """Millicores for messages: always with the unit (``1000m``, not ``1``)."""
    return f"{m}m"

__all__ = [
    "Verdict",
    "Why",
    "INPUT_REASONS",
    "Sizing",
    "ContainerInput",
    "Decision",
    "WorkloadDecision",
    "rate_percentile",
    "target_millicores",
    "limit_for",
    "decide_container",
    "decide_workload",
    "held_by_conflict",
    "MIN_CHANGE_M",
    "ROUND_TO_M",
]

#: Smallest change worth making, in millicores (DESIGN.md "One decision", step 4).
MIN_CHANGE_M = 10
#: Targets are rounded up to a multiple of this many millicores (step 3).
ROUND_TO_M = 5


class Verdict(StrEnum):
    CHANGED = "Changed"  # apply mode: reconcile patches the proposed values
    PROPOSED = "Proposed"  # dry-run: apply mode would have changed it
    HELD = "Held"  # nothing changes; ``why`` (status ``reason``) says what stopped it


class Why(StrEnum):
    # reasons a change goes (verdict changed / proposed)
    NEW_TARGET = "NewTarget"  # the full target, inside [floor, ceiling]
    STEP_LIMITED = "StepLimited"  # moved toward the target, cut by stepLimit
    # a bound: with a change it went to the bound; held, it sits there already
    AT_FLOOR = "AtFloor"  # the target was raised to spec floor
    AT_CEILING = "AtCeiling"  # the target was cut to spec ceiling
    AT_LIMIT = "AtLimit"  # cpuLimit: Keep and the target was cut to the CPU limit
    # reasons nothing changes (verdict held)
    INSIDE_DEADBAND = "InsideDeadband"  # |target − current| too small to bother
    SETTLING = "Settling"  # a decrease waits until the target stayed low for settle
    COOLING_DOWN = "CoolingDown"  # the workload changed less than cooldown ago
    BUDGET_SPENT = "BudgetSpent"  # global changes-per-minute or rollout slots used up
    EXTRAPOLATED = "Extrapolated"  # the rate lies beyond the model's trained range
    NO_METRICS = "NoMetrics"  # no usable per-pod rate (Prometheus down, no series)
    NO_MODEL = "NoModel"  # the sizing API had no answer for the model key
    HORIZONTAL_CONFLICT = "HorizontalConflict"  # an HPA scales this workload on CPU utilisation
    IN_PLACE_UNSUPPORTED = "InPlaceUnsupported"  # a resize cannot make this change
    REJECTED = "Rejected"  # the API server refused the change (set by reconcile)
    API_UNAVAILABLE = "ApiUnavailable"  # the workload's LIST failed (429/5xx …): not observed this pass
    # inputs of one container that failed on their own (the others are decided as usual)
    QUERY_REFUSED = "QueryRefused"  # the policy's rateQuery leaves its namespace (never sent)
    QUERY_FAILED = "QueryFailed"  # Prometheus refused the rate query (its error in the message)
    TOO_MANY_SERIES = "TooManySeries"  # the rate query answered more series than allowed
    INVALID_MODEL_KEY = "InvalidModelKey"  # the sizing API refused the model key of this item
    DEMAND_OUT_OF_RANGE = "DemandOutOfRange"  # the demand at this rate is beyond any physical bound
    CONTAINER_MISSING = "ContainerMissing"  # spec.containers names a container the workload lacks
    MODEL_STALE = "ModelStale"  # recent usage exceeds the model's band (controller/staleness): decreases held
    # set by the stages around the decision, never by decide_container
    POLICY_CONFLICT = "PolicyConflict"  # an older SizingPolicy names the same workload
    POLICY_INVALID = "PolicyInvalid"  # the spec cannot be acted on (status condition says why)
    WORKLOAD_NOT_FOUND = "WorkloadNotFound"  # the workload the policy names does not exist


#: reasons that mean an input was missing or unusable (the InputsAvailable condition is
#: False for them; Ready is False when every container has one)
INPUT_REASONS = frozenset({
    Why.NO_METRICS, Why.NO_MODEL, Why.API_UNAVAILABLE, Why.QUERY_REFUSED, Why.QUERY_FAILED, Why.TOO_MANY_SERIES,
    Why.INVALID_MODEL_KEY, Why.DEMAND_OUT_OF_RANGE, Why.CONTAINER_MISSING,
})


@dataclass(frozen=True)
class Sizing:
    """The sizing API's answer at the rate: demand and upper band in cores."""

    demand: float
    upper: float
    extrapolated: bool = False


@dataclass(frozen=True)
class ContainerInput:
    """What reconcile observed for one container this pass."""

    name: str
    request_m: int | None  # the pod template's CPU request (None: unset)
    limit_m: int | None  # the pod template's CPU limit (None: unset)
    rate: float | None  # per-pod request rate at the policy's percentile (None: no metrics)
    sizing: Sizing | None  # None: no model / sizing API unavailable
    #: why ``rate`` is None when it is this container's own problem: (reason, message);
    #: reason is a :class:`Why` value (QueryRefused, QueryFailed, TooManySeries, NoMetrics)
    rate_problem: tuple[str, str] | None = None
    #: why ``sizing`` is None for this item alone: (reason, message) — NoModel,
    #: InvalidModelKey, DemandOutOfRange
    sizing_problem: tuple[str, str] | None = None
    #: the model's trained range, capacity and curve points (asked only under an autoscaler)
    facts: ModelFacts | None = None
    #: this pass's staleness verdict on the container's model (None: not checked)
    stale: Staleness | None = None


@dataclass(frozen=True)
class Decision:
    """What to do with one container and why.

    ``proposed_m``/``proposed_limit_m`` are the values the decision puts forward —
    when held by a gate (Settling, CoolingDown, BudgetSpent, HorizontalConflict,
    InPlaceUnsupported) the values the gate stopped, otherwise the current ones.
    Reconcile writes them only when ``verdict`` is changed."""

    container: str
    verdict: Verdict
    why: Why
    current_m: int | None
    limit_m: int | None
    proposed_m: int | None
    proposed_limit_m: int | None
    target_m: int | None = None
    demand: float | None = None  # cores
    upper: float | None = None  # cores
    rate: float | None = None  # req/s per pod
    extrapolated: bool = False
    message: str = ""
    #: settling record to persist with this verdict
    settle: ContainerHistory = ContainerHistory()
    #: settling record to persist if the change is not applied after all (Rejected)
    settle_if_held: ContainerHistory = field(default=ContainerHistory(), repr=False)
    #: reserved cores per 100 req/s of the workload's load: now, and at the suggested size
    cores_per_100_now: float | None = field(default=None, compare=False)
    cores_per_100_suggested: float | None = field(default=None, compare=False)

    @property
    def moves(self) -> bool:
        """True if the proposed values differ from the current ones."""
        return self.proposed_m != self.current_m or self.proposed_limit_m != self.limit_m

    def to_status(self) -> dict[str, Any]:
        """This decision as a ``status.containers[]`` row (quantities as strings; fields
        without a value are left out — the CRD schema has no nullable fields).
        ``newRequest``/``newLimit`` only when the verdict is Changed or Proposed: a held
        row has no new value."""

        def q(m: int | None) -> str | None:
            return None if m is None else format_cpu(m)

        def cores(c: float | None) -> str | None:
            return None if c is None else format_cpu(round_up(c * 1000.0, 1))

        moving = self.verdict is not Verdict.HELD
        entry = {
            "name": self.container,
            "current": q(self.current_m),
            "newRequest": q(self.proposed_m) if moving else None,
            "target": q(self.target_m),
            "currentLimit": q(self.limit_m),
            "newLimit": q(self.proposed_limit_m) if moving else None,
            "demand": cores(self.demand),
            "demandBound": cores(self.upper),
            "rate": None if self.rate is None else round(self.rate, 6),
            "extrapolated": self.extrapolated,
            "verdict": self.verdict.value,
            "reason": self.why.value,
            "message": self.message,
        }
        return {k: v for k, v in entry.items() if v is not None}


@dataclass(frozen=True)
class WorkloadDecision:
    """The decisions for one policy's workload in one pass, and the history to keep."""

    policy: str  # namespace/name of the SizingPolicy
    workload: str  # namespace/Kind/name
    decisions: tuple[Decision, ...]
    #: history to persist in status (lastChangeTime = now if anything changed)
    history: WorkloadHistory
    #: history to persist if reconcile could not apply the change
    history_if_held: WorkloadHistory = field(default=WorkloadHistory(), repr=False)

    @property
    def changed(self) -> tuple[Decision, ...]:
        """The containers reconcile must patch (verdict changed)."""
        return tuple(d for d in self.decisions if d.verdict is Verdict.CHANGED)

    @property
    def proposed(self) -> tuple[Decision, ...]:
        return tuple(d for d in self.decisions if d.verdict is Verdict.PROPOSED)

    def rejected(self, message: str) -> WorkloadDecision:
        """The same pass after the API server refused the change: every changed
        container becomes held Rejected with ``message``; nothing counts as changed."""
        decisions = tuple(
            replace(d, verdict=Verdict.HELD, why=Why.REJECTED, message=message, settle=d.settle_if_held)
            if d.verdict is Verdict.CHANGED
            else d
            for d in self.decisions
        )
        return replace(self, decisions=decisions, history=self.history_if_held)


# ---------------------------------------------------------------- the steps


def rate_percentile(samples: Iterable[float], percentile: float) -> float | None:
    """The ``percentile`` (0–100) of per-pod rates by linear interpolation between
    order statistics (Hyndman & Fan 1996 type 7, numpy.percentile's default
    method 'linear'). NaN, infinite and negative samples are dropped; None if
    nothing is left."""
    xs = sorted(float(x) for x in samples if x is not None and math.isfinite(x) and x >= 0)
    if not xs:
        return None
    if not 0.0 <= percentile <= 100.0:
        raise ValueError(f"percentile must be in [0, 100], got {percentile}")
    h = (len(xs) - 1) * percentile / 100.0
    lo = math.floor(h)
    hi = min(lo + 1, len(xs) - 1)
    return xs[lo] + (h - lo) * (xs[hi] - xs[lo])


def target_millicores(
    upper_cores: float, *, headroom: float, floor_m: int, ceiling_m: int | None, limit_m: int | None = None
) -> tuple[int, Why | None]:
    """Step 2: upper × (1 + headroom) clamped to [floor, ceiling], rounded up to 5m,
    and (with ``limit_m``, i.e. cpuLimit: Keep) not above the limit.
    Returns (target, the bound it sits on or None)."""
    raw = upper_cores * 1000.0 * (1.0 + headroom)
    bound: Why | None = None
    if raw < floor_m:
        raw, bound = float(floor_m), Why.AT_FLOOR
    if ceiling_m is not None and raw > ceiling_m:
        raw, bound = float(ceiling_m), Why.AT_CEILING
    target = round_up(raw, ROUND_TO_M)
    if ceiling_m is not None and target > ceiling_m:
        target = ceiling_m
    if limit_m is not None and target > limit_m:
        target, bound = limit_m, Why.AT_LIMIT
    return target, bound


def limit_for(current_m: int | None, limit_m: int | None, new_m: int, mode: CpuLimit) -> int | None:
    """Step 7: the CPU limit that goes with request ``new_m``."""
    if mode is CpuLimit.DROP or limit_m is None:
        return None
    if mode is CpuLimit.KEEP:
        return limit_m
    if current_m is None or current_m <= 0:
        return max(limit_m, new_m)
    # KeepRatio: scale by the request's factor, whole millicores up, never below the request
    return max(round_up(limit_m * new_m / current_m, 1), new_m)


def _inside_deadband(current_m: int, target_m: int, deadband: float) -> bool:
    diff = abs(target_m - current_m)
    return not (diff > deadband * current_m and diff >= MIN_CHANGE_M)


def _why_or(value: str, default: Why) -> Why:
    """A reason named by an input adapter, as a :class:`Why` (an unknown name → ``default``)."""
    try:
        return Why(value)
    except ValueError:
        return default


def _no_metrics(
    name: str, history: ContainerHistory, message: str, *, current_m: int | None = None, limit_m: int | None = None,
) -> Decision:
    """The one NoMetrics decision: held at the current value, nothing observed to decide from."""
    return Decision(
        container=name, verdict=Verdict.HELD, why=Why.NO_METRICS, current_m=current_m, limit_m=limit_m,
        proposed_m=current_m, proposed_limit_m=limit_m, rate=None, message=message,
        settle=history, settle_if_held=history,
    )


def decide_container(
    policy: Policy, container: ContainerRule, observed: ContainerInput, *, history: ContainerHistory, now: datetime,
    coupled_m: int | None = None,
) -> Decision:
    """Steps 1–5 and 7 for one container; the verdict is ``changed`` or ``held``
    (the workload gates, dry-run and the budget come in :func:`decide_workload`).
    ``coupled_m``: the request sized with a CPU-utilisation autoscaler, taken as the
    target instead of upper × (1 + headroom) (bounds and rounding still apply)."""
    current = observed.request_m if observed.request_m is not None else observed.limit_m
    limit = observed.limit_m
    # the fields every outcome shares (each return names its why); one Decision per return
    # (cheaper than dataclasses.replace)
    base: dict[str, Any] = dict(
        container=container.name,
        verdict=Verdict.HELD,
        current_m=current,
        limit_m=limit,
        proposed_m=current,
        proposed_limit_m=limit,
        rate=observed.rate,
        settle=history,
        settle_if_held=history,
    )

    def out(**fields: Any) -> Decision:
        return Decision(**{**base, **fields})

    rate = observed.rate
    if rate is None or not math.isfinite(rate) or rate < 0:
        if observed.rate_problem is not None:
            why, message = observed.rate_problem
            return replace(_no_metrics(container.name, history, message, current_m=current, limit_m=limit),
                           why=_why_or(why, Why.NO_METRICS))
        return _no_metrics(container.name, history, "no usable per-pod request rate this pass; nothing changes",
                           current_m=current, limit_m=limit)
    s = observed.sizing
    if s is None:
        if observed.sizing_problem is not None:
            why, message = observed.sizing_problem
            return out(why=_why_or(why, Why.NO_MODEL), message=f"model {container.model!r}: {message}")
        return out(why=Why.NO_MODEL, message=f"the sizing API has no answer for model {container.model!r}")
    if not (math.isfinite(s.demand) and math.isfinite(s.upper) and s.demand >= 0 and s.upper >= 0):
        return out(why=Why.NO_MODEL, message=f"the sizing API answered an unusable demand for {container.model!r}")
    keep_limit = limit if policy.cpu_limit is CpuLimit.KEEP else None
    target, bound = target_millicores(
        s.upper, headroom=policy.headroom, floor_m=container.floor_m, ceiling_m=container.ceiling_m, limit_m=keep_limit
    )
    if coupled_m is not None:
        target, bound = target_millicores(
            coupled_m / 1000.0, headroom=0.0, floor_m=container.floor_m, ceiling_m=container.ceiling_m,
            limit_m=keep_limit,
        )
    base.update(target_m=target, demand=s.demand, upper=s.upper, extrapolated=s.extrapolated)
    if s.extrapolated and not policy.allow_extrapolation:
        return out(
            why=Why.EXTRAPOLATED,
            message=f"rate {rate:g}/s is beyond the trained range of {container.model!r}; "
            "retrain the model or set allowExtrapolation",
        )
    note = " (extrapolated beyond the trained range)" if s.extrapolated else ""
    stale = observed.stale if observed.stale is not None and observed.stale.stale else None
    if stale is not None:
        # a stale model (controller/staleness): observed usage may raise the target (the curve
        # under-predicts), nothing lowers it — decreases and holds say ModelStale, and no
        # settling record builds up on the stale curve's word
        p95 = stale.usage_p95
        if p95 is not None and math.isfinite(p95) and p95 > s.upper:
            target, bound = target_millicores(p95, headroom=policy.headroom, floor_m=container.floor_m,
                                              ceiling_m=container.ceiling_m, limit_m=keep_limit)
            base.update(target_m=target)
        base.update(settle=ContainerHistory(), settle_if_held=ContainerHistory())
        if current is not None and (target <= current or _inside_deadband(current, target, policy.deadband)):
            return out(why=Why.MODEL_STALE, message=stale.message())
        note += f" ({stale.message()})"

    def change(new_m: int, limited: bool, settle_after: ContainerHistory, settle_held: ContainerHistory) -> Decision:
        new_limit = limit_for(current, limit, new_m, policy.cpu_limit)
        why = Why.STEP_LIMITED if limited else (bound if (bound and new_m == target) else Why.NEW_TARGET)
        verb = "raise" if current is None or new_m > current else "lower"
        msg = f"{verb} to {_mc(new_m)} (target {_mc(target)})"
        if limited:
            pct = round((policy.step_limit.up - 1.0) * 100) if verb == "raise" else round((1.0 - policy.step_limit.down) * 100)
            msg += f", cut by stepLimit.{'maxIncreasePercent' if verb == 'raise' else 'maxDecreasePercent'} {pct}"
        return out(
            verdict=Verdict.CHANGED,
            why=why,
            proposed_m=new_m,
            proposed_limit_m=new_limit,
            message=msg + note,
            settle=settle_after,
            settle_if_held=settle_held,
        )

    if current is None:
        return change(target, False, ContainerHistory(), ContainerHistory())

    # settling record: since when the target has stayed below the current request
    if target < current:
        if history.below_since is not None and history.peak_m is not None:
            settling = ContainerHistory(below_since=history.below_since, peak_m=max(history.peak_m, target))
        else:
            settling = ContainerHistory(below_since=now, peak_m=target)
    else:
        settling = ContainerHistory()
    base.update(settle=settling, settle_if_held=settling)

    if _inside_deadband(current, target, policy.deadband):
        why = bound or Why.INSIDE_DEADBAND
        return out(
            why=why, message=f"target {_mc(target)} is within the deadband of {_mc(current)}"
        )
    up, down = policy.step_limit.up, policy.step_limit.down
    if target > current:
        new_m, limited = step_limit(current, target, up=up, down=down)
        return change(new_m, limited, ContainerHistory(), settling)

    # a decrease: only after settle, and to the highest target seen while settling
    assert settling.below_since is not None and settling.peak_m is not None
    goal = settling.peak_m
    new_m, limited = step_limit(current, goal, up=up, down=down)
    waited = (now - settling.below_since).total_seconds()
    if waited < policy.settle_s:
        return out(
            why=Why.SETTLING,
            proposed_m=new_m,
            proposed_limit_m=limit_for(current, limit, new_m, policy.cpu_limit),
            message=f"target below {_mc(current)} for {int(waited)}s of {int(policy.settle_s)}s settle",
        )
    if _inside_deadband(current, goal, policy.deadband):
        # a full settle period has passed without a decrease worth making: start a fresh
        # settle window here, so the next decrease goes to the highest target of the last
        # settle period — a slowly falling load is followed down (found by the replay)
        fresh = ContainerHistory(below_since=now, peak_m=target)
        return out(
            why=Why.INSIDE_DEADBAND,
            message=f"highest target while settling {_mc(goal)} is within the deadband of {_mc(current)}",
            settle=fresh,
            settle_if_held=fresh,
        )
    after = settling if limited else ContainerHistory()
    return change(new_m, limited, after, settling)


def _in_place_problem(d: Decision) -> str | None:
    if d.current_m is None:
        return "a resize cannot add a first CPU request (the QoS class would change)"
    if d.limit_m is not None and d.proposed_limit_m is None:
        return "a resize cannot remove a CPU limit"
    if (d.current_m == d.limit_m) != (d.proposed_m == d.proposed_limit_m):
        return "the change would make request and limit (un)equal, so the pod's QoS class could change"
    return None


def decide_workload(
    policy: Policy,
    observed: Sequence[ContainerInput],
    *,
    history: WorkloadHistory,
    now: datetime,
    budget: BudgetView = BudgetView(),
    hpa_on_cpu: bool = False,
    dry_run: bool = False,
    autoscaler: AutoscalerView | None = None,
    replicas: int | None = None,
) -> WorkloadDecision:
    """All containers of one policy (in the policy's order), then the workload gates.

    ``hpa_on_cpu``: a HorizontalPodAutoscaler targets the workload with a CPU
    ``Utilization`` metric. ``dry_run`` forces dry-run (``ratefit run --dry-run``,
    ``ratefit plan``). A container named by the policy but not observed is held
    NoMetrics. In apply mode the caller must ``Budget.spend`` once when the result
    has changed containers, and persist ``history`` after the patch succeeded (or
    ``rejected(...)`` and its history if it failed). ``autoscaler``: the workload's
    autoscaler as ``controller/hpa_sizing`` sees it; ``replicas``: the workload's
    current replicas (for cores per 100 req/s)."""
    by_name: Mapping[str, ContainerInput] = {o.name: o for o in observed}
    decisions: list[Decision] = []
    hints: dict[str, AutoscalerHint] = {}
    for c in policy.containers:
        h = history.container(c.name)
        o = by_name.get(c.name)
        if o is None:
            decisions.append(replace(
                _no_metrics(c.name, h, f"container {c.name!r} is not in {policy.workload_key}; fix spec.containers"),
                why=Why.CONTAINER_MISSING))
            continue
        current = o.request_m if o.request_m is not None else o.limit_m
        hint = hints[c.name] = autoscaler_hint(autoscaler, container=c.name, observed_rate=o.rate,
                                               current_m=current, facts=o.facts)
        coupled = hint.coupled_m if (hpa_on_cpu and policy.allow_horizontal_conflict) else None
        decisions.append(decide_container(policy, c, o, history=h, now=now, coupled_m=coupled))

    def hold(d: Decision, why: Why, message: str) -> Decision:
        return replace(d, verdict=Verdict.HELD, why=why, message=message, settle=d.settle_if_held)

    # A CPU-utilisation autoscaler blocks every move, also a decrease still settling:
    # the reviewer should see the hard block now, not after the settle period.
    def wants(d: Decision) -> bool:
        return d.verdict is Verdict.CHANGED or d.why is Why.SETTLING

    if any(wants(d) for d in decisions) and hpa_on_cpu and not policy.allow_horizontal_conflict:
        msg = (
            "a HorizontalPodAutoscaler scales this workload on CPU utilisation; changing requests "
            "moves its measurement (set allowHorizontalConflict to change anyway)"
        )
        decisions = [hold(d, Why.HORIZONTAL_CONFLICT, msg) if wants(d) else d for d in decisions]
    if policy.resize_by is ResizeBy.IN_PLACE:
        for i, d in enumerate(decisions):
            if d.verdict is Verdict.CHANGED and (problem := _in_place_problem(d)):
                decisions[i] = hold(d, Why.IN_PLACE_UNSUPPORTED, problem + "; use resizeBy Rollout")
    if any(d.verdict is Verdict.CHANGED for d in decisions):
        wait = Cooldown(policy.cooldown_s).remaining(history.last_change, now)
        if wait > 0:
            msg = f"the workload changed less than {int(policy.cooldown_s)}s ago; {int(math.ceil(wait))}s of cooldown left"
            decisions = [hold(d, Why.COOLING_DOWN, msg) if d.verdict is Verdict.CHANGED else d for d in decisions]
    dry = dry_run or policy.mode is Mode.DRY_RUN
    if any(d.verdict is Verdict.CHANGED for d in decisions):
        if dry:
            decisions = [
                _propose(d, history.container(d.container).proposed_m, policy) if d.verdict is Verdict.CHANGED else d
                for d in decisions
            ]
        elif (refusal := budget.refusal()) is not None:
            decisions = [
                hold(d, Why.BUDGET_SPENT, refusal + "; retried next pass") if d.verdict is Verdict.CHANGED else d
                for d in decisions
            ]
    decisions = [_with_autoscaler(d, hints.get(d.container), autoscaler, replicas) for d in decisions]
    changed = any(d.verdict is Verdict.CHANGED for d in decisions)

    def shown(h: ContainerHistory, d: Decision) -> ContainerHistory:
        # the proposal the status will show (its row's newRequest), as history_from_status reads it back
        p = d.proposed_m if d.verdict is Verdict.PROPOSED else None
        return h if h.proposed_m == p else replace(h, proposed_m=p)

    held_history = WorkloadHistory(
        last_change=history.last_change, containers={d.container: shown(d.settle_if_held, d) for d in decisions}
    )
    new_history = WorkloadHistory(
        last_change=now if changed else history.last_change,
        containers={d.container: shown(d.settle, d) for d in decisions},
    )
    return WorkloadDecision(
        policy=policy.key,
        workload=policy.workload_key,
        decisions=tuple(decisions),
        history=new_history,
        history_if_held=held_history,
    )


def _propose(d: Decision, shown_m: int | None, policy: Policy) -> Decision:
    """A change DryRun proposes instead of making (verdict Proposed). While the new value
    stays within the deadband of the proposal the status already shows (``shown_m``, on
    the same side of the current request), that proposal stands: the reviewer's figure and
    the Events do not follow every small move of the rates (an Apply-mode change would not
    be made for such a move either: step 3)."""
    out = replace(d, verdict=Verdict.PROPOSED, settle=d.settle_if_held)
    new = d.proposed_m
    if (shown_m is None or new is None or shown_m == new or d.current_m is None
            or (shown_m > d.current_m) != (new > d.current_m) or shown_m == d.current_m
            or not _inside_deadband(shown_m, new, policy.deadband)):
        return out
    return replace(out, proposed_m=shown_m,
                   proposed_limit_m=limit_for(d.current_m, d.limit_m, shown_m, policy.cpu_limit),
                   message=f"{d.message}; the proposal of {_mc(shown_m)} stands: {_mc(new)} is within its deadband")


def _with_autoscaler(
    d: Decision, hint: AutoscalerHint | None, autoscaler: AutoscalerView | None, replicas: int | None,
) -> Decision:
    """The autoscaler's words in the message, and cores per 100 req/s now and suggested."""
    n = autoscaler.replicas if autoscaler is not None else replicas
    if hint is None or n is None:
        return d
    now = cores_per_100(d.current_m, d.rate, n, n)
    if hint.coupled is not None and hint.coupled.best is not None:
        suggested: float | None = hint.coupled.best.cores_per_100_rps
    else:
        suggested = cores_per_100(d.proposed_m, d.rate, n, hint.replicas_after if hint.replicas_after is not None else n)
    message = f"{d.message}; {hint.message}" if hint.message and d.message else (hint.message or d.message)
    return replace(d, message=message, cores_per_100_now=now, cores_per_100_suggested=suggested)


def held_by_conflict(
    policy: Policy, observed: Sequence[ContainerInput], *, history: WorkloadHistory, older: str
) -> WorkloadDecision:
    """Every container of a policy held **PolicyConflict**: the older SizingPolicy
    ``older`` (namespace/name) names the same workload and keeps acting on it. The
    history is kept as it is (this policy decides nothing)."""
    by_name: Mapping[str, ContainerInput] = {o.name: o for o in observed}
    message = (
        f"SizingPolicy {older} is older and already sizes {policy.workload_key}; this policy is held "
        "until one of the two is deleted or names another workload"
    )
    decisions = []
    for c in policy.containers:
        o = by_name.get(c.name)
        current = None if o is None else (o.request_m if o.request_m is not None else o.limit_m)
        limit = None if o is None else o.limit_m
        h = history.container(c.name)
        decisions.append(Decision(
            container=c.name, verdict=Verdict.HELD, why=Why.POLICY_CONFLICT, current_m=current, limit_m=limit,
            proposed_m=current, proposed_limit_m=limit, rate=None if o is None else o.rate, message=message,
            settle=h, settle_if_held=h,
        ))
    return WorkloadDecision(policy=policy.key, workload=policy.workload_key, decisions=tuple(decisions),
                            history=history, history_if_held=history)
