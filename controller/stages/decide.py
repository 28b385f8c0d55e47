"""Decide: the pure rules of ``controller/decide.py`` applied to a snapshot, plus the
one thing that lives across passes — the global budget (changes per minute,
concurrent rollouts; ``controller/limits.Budget``) and each workload's backoff
deadline after an API failure.

The budget is seeded once after a start from the policies' status (changes of the
last minute count against the token bucket, so a crash loop cannot exceed it) and
taken once per changed workload. The rollout slots follow what the cluster says is
rolling (level-based).

A policy the observe stage marked ``conflict_with`` an older one is held
**PolicyConflict** (``decide.held_by_conflict``): it draws nothing from the budget.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import replace
from datetime import datetime

from ratefit.controller.decide import ContainerInput, WorkloadDecision, decide_workload, held_by_conflict
from ratefit.controller.limits import Budget, BudgetView
from ratefit.controller.policy import Mode, WorkloadHistory, history_from_status, parse_time
from ratefit.controller.stages.observe import Observed, Snapshot
from ratefit.controller.workload import LAST_CHANGE_ANNOTATION, Workload

__all__ = ["LAST_CHANGE_ANNOTATION", "Decider"]



class Decider:
    """Decides every policy of a snapshot; owns the budget and the backoff deadlines."""

    def __init__(
        self, *, budget: Budget, monotonic: Callable[[], float], dry_run: bool = False, write: bool = True,
    ) -> None:
        self.budget = budget
        self._mono = monotonic
        self.dry_run = dry_run
        self.write = write
        #: workload key → monotonic time before which it is not tried again
        self.retry_at: dict[str, float] = {}
        self._seeded = False

    def decide_all(self, snap: Snapshot) -> tuple[WorkloadDecision | None, ...]:
        """One decision per entry (None: nothing to decide — invalid, missing or unavailable)."""
        if self.budget.slots is not None:
            self.budget.slots.sync(list(snap.rolling))  # level-based: the cluster says what is rolling
        if not self._seeded:
            self._seed(snap)
        mono = self._mono()
        return tuple(
            self.decide_one(o, o.workload, o.inputs, snap.now, mono) if o.policy is not None and o.workload is not None else None
            for o in snap.entries
        )

    def applies(self, o: Observed) -> bool:
        """True when this policy's decisions are carried out (apply mode, writes allowed)."""
        return o.policy is not None and o.policy.mode is Mode.APPLY and not self.dry_run and self.write

    def decide_one(
        self, o: Observed, workload: Workload | None, inputs: Sequence[ContainerInput], now: datetime, mono: float, *,
        spent: bool = False, history: WorkloadHistory | None = None,
    ) -> WorkloadDecision:
        """Decide one policy and take its share of the budget. ``spent``: the budget was
        already taken for this workload this pass (a recompute after a conflict).
        ``history``: the history to decide from, given directly (the replay carries it
        from pass to pass); None reads it from the policy's status and the workload's
        last-change annotation (:func:`history_of`), as the live loop does."""
        p = o.policy
        assert p is not None
        if o.conflict_with is not None:
            return held_by_conflict(p, inputs, history=history if history is not None else history_of(o, workload),
                                    older=o.conflict_with)
        apply = self.applies(o)
        view = self.budget.view(mono) if apply and not spent else BudgetView()
        if history is None:
            history = history_of(o, workload)
        extra = dict(autoscaler=o.autoscaler, replicas=workload.replicas if workload is not None else None)
        wd = decide_workload(p, inputs, history=history, now=now, budget=view,
                             hpa_on_cpu=o.hpa_on_cpu, dry_run=not apply, **extra)
        if wd.changed and not spent:
            retry_at = self.retry_at.get(p.workload_key)
            if retry_at is not None and mono < retry_at:
                return wd.rejected(f"the API server failed earlier; backing off {retry_at - mono:.0f}s more")
            if not self.budget.spend(p.workload_key, mono):
                wd = decide_workload(p, inputs, history=history, now=now,
                                     budget=BudgetView(changes_left=0), hpa_on_cpu=o.hpa_on_cpu, dry_run=False,
                                     **extra)
        return wd

    def _seed(self, snap: Snapshot) -> None:
        self._seeded = True
        bucket = self.budget.bucket
        if bucket is None:
            return
        mono = self._mono()
        for o in snap.entries:
            last = history_from_status(o.obj.status).last_change
            if last is not None and 0 <= (snap.now - last).total_seconds() < 60:
                bucket.try_take(mono)


def history_of(o: Observed, workload: Workload | None) -> WorkloadHistory:
    """The policy's history from its status; the last change is the later of the
    status and the workload's ``ratefit.dev/last-change`` annotation (written with
    the change itself, so it survives a crash before the status write)."""
    hist = history_from_status(o.obj.status)
    ann = (workload.annotations or {}).get(LAST_CHANGE_ANNOTATION) if workload is not None else None
    if ann:
        try:
            t = parse_time(ann)
            if hist.last_change is None or t > hist.last_change:
                hist = replace(hist, last_change=t)
        except ValueError:
            pass
    return hist
