"""The pass: observe → decide → act → record, in that order, and the ONE place where a
pass's outcome becomes metrics and the pass log line.

:class:`Reconciler` is built with separate reader and writer: ``kube`` (the adapter)
writes, and reads unless ``reader`` is given — ``ratefit run`` passes a watch-fed
cache as the reader, ``ratefit plan`` reads through the adapter (LIST).
Level-based and idempotent: every pass recomputes from what it observes; on an
unchanged world a second pass writes nothing.
"""

from __future__ import annotations

import gc
import json
import logging
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, replace
from datetime import datetime, timezone
from typing import Protocol

from ratefit.controller.errors import KubeError
from ratefit.controller.limits import Budget, ExponentialBackoff
from ratefit.controller.review import ReviewRow
from ratefit.controller.stages.act import Actor
from ratefit.controller.stages.decide import Decider
from ratefit.controller.stages.observe import Observer
from ratefit.controller.stages.outcome import PassOutcome, PassResult
from ratefit.controller.stages.ports import Kube, KubeReader, RateSource, SizingSource
from ratefit.controller.stages.record import review_rows
from ratefit.controller.stages.steady import SteadyMemo, cpu_samples
from ratefit.controller.stages.write import RecordWriter
from ratefit.controller.telemetry import CpuSample, Telemetry

__all__ = ["PassOutcome", "PassResult", "ReconcileConfig", "Reconciler"]

log = logging.getLogger("ratefit.controller.reconcile")


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
    #: reuse a policy's last decision, rows and status verdict while nothing it depends on
    #: changed and that decision read neither the clock nor the budget (``stages/steady.py``)
    reuse_unchanged: bool = True
    #: write a status whose only news is figures (rate, demand, band, target) at most this
    #: often per policy, seconds (0: at once; ``stages/write.py``; ``ratefit run`` default 5 min)
    status_figures_every_s: float = 0.0


class PassControl(Protocol):
    """What a pass may ask the loop (``loop.PassControl``)."""

    should_stop: Callable[[], bool]
    may_act: Callable[[], bool]


class Reconciler:
    """Runs passes. Holds what must live across passes in one process (the budget's
    token bucket, the per-workload backoff, the parsed policies)."""

    def __init__(
        self, *, kube: Kube, rates: RateSource, sizing: SizingSource, reader: KubeReader | None = None,
        config: ReconcileConfig = ReconcileConfig(), budget: Budget | None = None,
        backoff: ExponentialBackoff | None = None, telemetry: Telemetry | None = None,
        wall_clock: Callable[[], datetime] = lambda: datetime.now(timezone.utc),
        monotonic: Callable[[], float] = time.monotonic, crash_hook: Callable[[str], None] | None = None,
        usage: object | None = None, retrainer: object | None = None, retrain_all: bool = False,
    ) -> None:
        self.kube = kube
        #: stale models (issue 13): recent usage source (None: no check) and the background retrainer
        self.usage = usage
        self.retrainer = retrainer
        self.retrain_all = retrain_all
        self.config = config
        self.budget = budget or Budget()
        self.telemetry = telemetry or Telemetry()
        self._now = wall_clock
        self._mono = monotonic
        self._hook = crash_hook or (lambda point: None)
        self.observer = Observer(reader=reader or kube, rates=rates, sizing=sizing, telemetry=self.telemetry,
                                 namespaces=config.namespaces, shard=config.shard, usage=usage)
        self.decider = Decider(budget=self.budget, monotonic=monotonic, dry_run=config.dry_run, write=config.write)
        self.actor = Actor(kube=kube, decider=self.decider, telemetry=self.telemetry, backoff=backoff,
                           monotonic=monotonic, hook=self._hook, conflict_attempts=config.conflict_attempts)
        self.writer = RecordWriter(kube=kube, telemetry=self.telemetry, dry_run=config.dry_run,
                                   figures_every_s=config.status_figures_every_s, monotonic=monotonic)
        #: the steady-state memo (``stages/steady.py``); None: every policy is decided every pass
        self.memo: SteadyMemo | None = SteadyMemo() if config.reuse_unchanged else None

    def run_pass(self, control: PassControl | None = None) -> PassResult:
        """One pass. ``control`` may say stop / not leader.

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

    def _run_pass(self, control: PassControl | None) -> PassResult:
        should_stop = getattr(control, "should_stop", None) or (lambda: False)
        may_act = getattr(control, "may_act", None) or (lambda: True)
        t0, c0 = self._mono(), time.process_time()
        now = self._now()
        try:
            snap = self.observer.observe(now)
        except KubeError as exc:
            self.telemetry.kube_errors.labels(kind=type(exc).__name__).inc()
            log.error("pass failed: cannot list SizingPolicies: %s", exc)
            return self._finish(PassResult(outcome=PassOutcome.FAILED, errors=(str(exc),)), t0, {})
        t1, c1 = self._mono(), time.process_time()
        if self.retrainer is not None and snap.staleness:
            self._queue_retrains(snap, now)
        memo = self.memo
        known = [memo.lookup(o, now) if memo is not None else (None, None) for o in snap.entries]
        todo = [o for o, (_, got) in zip(snap.entries, known) if got is None]
        fresh = iter(self.decider.decide_all(replace(snap, entries=tuple(todo))))
        decisions = [got.decision if got is not None else next(fresh) for _, got in known]
        t2, c2 = self._mono(), time.process_time()
        errors = list(snap.errors)
        rows: list[ReviewRow] = []
        samples: list[CpuSample] = []
        verdicts: dict[tuple[str, str], int] = {}
        patched: list[str] = []
        writes = events = 0
        abandoned = False
        for o, wd, (key, got) in zip(snap.entries, decisions, known):
            if should_stop():
                abandoned = True  # finish nothing half: the rest is left as it was
                break
            if wd is not None and wd.changed and not may_act():
                abandoned = True  # lost the Lease: another replica acts now
                break
            acted = self.actor.act(o, wd, now, errors, may_act=may_act)
            if acted.patched and o.policy is not None:
                patched.append(o.policy.workload_key)
            if got is not None:  # the same inputs as a fixed point of an earlier pass: the same rows
                mine, my_samples = got.rows, got.samples
            else:
                mine = tuple(review_rows(o, acted.decision, dry_run=self.config.dry_run))
                my_samples = cpu_samples(mine)
            rows.extend(mine)
            samples.extend(my_samples)
            for d in acted.decision.decisions if acted.decision is not None else ():
                vk = (d.verdict.value, d.why.value)
                verdicts[vk] = verdicts.get(vk, 0) + 1
            current = False  # the stored status says all this pass would write (known only if the writer ran)
            if self.config.write and may_act():
                if got is not None:
                    w, ev, current = 0, 0, True  # the stored status was current for these inputs: it still is
                else:
                    w, ev = self.writer.write(acted, now, errors)
                    current = self.writer.was_current
                writes, events = writes + w, events + ev
                if w:
                    self._hook("after-status")
            elif not self.config.write:
                current = True  # read only (plan): no status to keep current
            if memo is not None and got is None:
                if acted.decision is wd:
                    memo.remember(o, key, wd, mine, my_samples, now, status_current=current)
                else:
                    memo.forget(o)
        for (verdict, why), n in verdicts.items():
            self.telemetry.decisions.labels(verdict=verdict, reason=why).inc(n)
        if memo is not None:
            memo.keep_only({(o.obj.namespace, o.obj.name) for o in snap.entries})
            memo.reused = sum(1 for _, got in known if got is not None)
            memo.decided = len(todo)
        t3, c3 = self._mono(), time.process_time()
        outcome = PassOutcome.ABANDONED if abandoned else (PassOutcome.DEGRADED if errors else PassOutcome.DONE)
        retry_at = self.decider.retry_at
        result = PassResult(
            outcome=outcome, rows=tuple(rows), policies=len(snap.entries),
            invalid=sum(1 for o in snap.entries if o.invalid is not None), patched=tuple(patched),
            status_writes=writes, events=events, errors=tuple(errors),
            requeue_after=max(1.0, min(retry_at.values()) - self._mono()) if retry_at else None,
        )
        # wall and CPU seconds per phase (CPU: this process, all threads) — for the benchmark
        phases = dict(snap.split, gather=t1 - t0, decide=t2 - t1, act=t3 - t2,
                      gather_cpu=c1 - c0, decide_cpu=c2 - c1, act_cpu=c3 - c2)
        if memo is not None:
            phases.update(reused=float(memo.reused), decided=float(memo.decided))
        return self._finish(result, t0, phases, samples=samples)

    def _queue_retrains(self, snap: object, now: datetime) -> None:
        """Hand stale models to the background retrainer (never waits for training)."""
        from ratefit.controller.retrain import jobs_for

        end = getattr(self.usage, "at", None) or now.timestamp()
        window = float(getattr(self.usage, "window_s", 6 * 3600.0))
        try:
            self.retrainer.submit_all(jobs_for(snap, now=end, window_s=window,  # type: ignore[attr-defined]
                                               retrain_all=self.retrain_all))
        except Exception as exc:  # retraining is an extra: it never fails a pass
            log.warning("queueing retrains failed: %s", exc)

    def _finish(self, result: PassResult, t0: float, phases: Mapping[str, float], *,
                samples: list[CpuSample] | None = None) -> PassResult:
        """The one place a pass becomes metrics and its log line."""
        dur = self._mono() - t0
        view = self.budget.view(self._mono())
        if view.changes_left is not None:
            self.telemetry.budget_left.set(view.changes_left)
        if view.rollouts_free is not None:
            self.telemetry.rollout_slots_left.set(view.rollouts_free)
        self.telemetry.passes.labels(outcome=result.outcome.value).inc()
        if result.outcome in (PassOutcome.DONE, PassOutcome.DEGRADED):
            self.telemetry.set_cpu(samples if samples is not None else cpu_samples(result.rows))
        self.telemetry.pass_duration.observe(dur)
        self.telemetry.last_pass.set(time.time())
        log.info(json.dumps({
            "msg": "pass", "identity": self.config.identity, "outcome": result.outcome.value, "policies": result.policies,
            "invalid": result.invalid, "patched": len(result.patched), "status_writes": result.status_writes,
            "events": result.events, "errors": len(result.errors), "seconds": round(dur, 3),
        }, sort_keys=True))
        return replace(result, duration_s=dur, phases=dict(phases))
