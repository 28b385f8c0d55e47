"""Act: carry out one policy's decision in the cluster.

In apply mode a server-side dry run of the change, then one strategic-merge patch of
the workload's pod template (every changed container in that one patch, so a
workload is never half-changed; the adapter records the previous requests in the
``ratefit.dev/previous-requests`` annotation and the change time in
``ratefit.dev/last-change`` in the same patch), or with ``resizeBy: InPlace`` the
pods' ``resize`` subresource one pod at a time followed by a metadata-only patch of
the change time. A 409 on the patch → re-read the workload (a fresh GET through the
adapter), recompute, retry (bounded). 429/5xx (after the adapter's own retries) →
the workload is held this pass and backs off (``limits.ExponentialBackoff``).

Crash hook points (``RATEFIT_CRASH_AT``): ``after-dry-run`` and ``after-patch`` here,
``after-status`` in the orchestrator.
"""

from __future__ import annotations

import logging
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, replace
from datetime import datetime

from ratefit.controller.decide import ContainerInput, WorkloadDecision
from ratefit.controller.errors import KubeConflict, KubeError, KubeInvalid, KubeNotFound
from ratefit.controller.limits import ExponentialBackoff
from ratefit.controller.policy import ResizeBy, format_time
from ratefit.controller.stages.decide import LAST_CHANGE_ANNOTATION, Decider
from ratefit.controller.stages.observe import Observed
from ratefit.controller.stages.ports import Kube
from ratefit.controller.telemetry import Telemetry
from ratefit.controller.workload import CpuChange, Pod, Workload

__all__ = ["Acted", "Actor", "changes_of"]

log = logging.getLogger("ratefit.controller.reconcile")


@dataclass(frozen=True)
class Acted:
    """One policy after the act stage: the workload as last seen and the final decision."""

    observed: Observed
    workload: Workload | None
    decision: "WorkloadDecision | None"
    #: True: the workload's CPU was changed in the cluster this pass
    patched: bool = False


class _LostLease(Exception):
    """Raised between the dry run and the patch when this replica no longer leads."""


def changes_of(wd: WorkloadDecision) -> dict[str, CpuChange]:
    """The changed containers of a decision as the adapter's CpuChange values."""
    out = {}
    for d in wd.changed:
        drop = d.limit_m is not None and d.proposed_limit_m is None
        out[d.container] = CpuChange(
            request_m=d.proposed_m,
            limit_m=None if drop or d.proposed_limit_m == d.limit_m else d.proposed_limit_m,
            drop_limit=drop,
        )
    return out


class Actor:
    """Applies decisions through the adapter (:class:`~ratefit.controller.stages.ports.Kube`)."""

    def __init__(
        self, *, kube: Kube, decider: Decider, telemetry: Telemetry, backoff: ExponentialBackoff | None,
        monotonic: Callable[[], float], hook: Callable[[str], None], conflict_attempts: int = 3,
    ) -> None:
        self.kube = kube
        self.decider = decider
        self.telemetry = telemetry
        self.backoff = backoff
        self._mono = monotonic
        self._hook = hook
        self.conflict_attempts = conflict_attempts

    def act(self, o: Observed, wd: WorkloadDecision | None, now: datetime, errors: list[str], *,
            may_act: Callable[[], bool]) -> Acted:
        """Apply a changed decision (the caller checked ``may_act`` first); re-apply an
        in-place value to new pods; otherwise nothing."""
        if o.policy is not None and wd is not None and wd.changed:
            workload, wd = self._apply(o, wd, now, errors, may_act=may_act)
            return Acted(o, workload, wd, patched=wd.changed)
        if self._reapplies(o, wd) and may_act():
            self._reapply_in_place(o, wd, errors)  # type: ignore[arg-type]
        return Acted(o, o.workload, wd)

    # -- rollout / in-place with 409 handling ----------------------------------------
    def _apply(self, o: Observed, wd: WorkloadDecision, now: datetime, errors: list[str], *,
               may_act: Callable[[], bool]) -> tuple[Workload | None, WorkloadDecision]:
        """Dry-run then patch (or resize pods); on 409 re-read, recompute and retry."""
        p = o.policy
        assert p is not None and o.workload is not None
        key = p.workload_key
        workload: Workload = o.workload
        inputs: tuple[ContainerInput, ...] = o.inputs
        for _ in range(max(1, self.conflict_attempts)):
            if not wd.changed:
                return workload, wd
            try:
                if p.resize_by is ResizeBy.IN_PLACE:
                    workload = self._resize_in_place(workload, wd, now)
                else:
                    def between() -> None:  # after the server-side dry run, before the patch
                        self._hook("after-dry-run")
                        if not may_act():
                            raise _LostLease()

                    try:
                        self.kube.patch_cpu(workload, changes_of(wd), annotations=_annotations(now),
                                            after_dry_run=between)
                    except _LostLease:
                        return workload, wd.rejected("lost the leader Lease before patching; nothing changed")
                    self.telemetry.changes.labels(resize_by="Rollout").inc()
                    self._hook("after-patch")
                self.decider.retry_at.pop(key, None)
                if self.backoff is not None:
                    self.backoff.forget(key)
                return workload, wd
            except KubeConflict as exc:
                self.telemetry.patch_errors.labels(kind="KubeConflict").inc()
                log.info("%s changed under us (%s); re-reading and recomputing", key, exc)
                try:
                    workload = self.kube.read_workload(p.namespace, workload.kind, p.workload_name)
                except KubeNotFound:
                    return workload, wd.rejected(f"{key} was deleted")
                except KubeError as exc2:
                    errors.append(str(exc2))
                    return workload, wd.rejected(f"re-reading after a conflict failed: {exc2}")
                inputs = _refreshed(inputs, workload)
                wd = self.decider.decide_one(o, workload, inputs, now, self._mono(), spent=True)
            except KubeInvalid as exc:
                self.telemetry.patch_errors.labels(kind="KubeInvalid").inc()
                return workload, wd.rejected(f"the API server refused the change: {exc.server_message}")
            except KubeError as exc:  # 429/5xx after the adapter's retries, 403, 404 …
                self.telemetry.patch_errors.labels(kind=type(exc).__name__).inc()
                errors.append(f"{key}: {exc}")
                delay = self.backoff.failed(key) if self.backoff is not None else 30.0
                self.decider.retry_at[key] = self._mono() + delay
                return workload, wd.rejected(f"not applied: {exc}; retried after backoff")
        return workload, wd.rejected(f"still conflicting after {self.conflict_attempts} attempts; retried next pass")

    # -- in-place -------------------------------------------------------------------
    def _reapplies(self, o: Observed, wd: WorkloadDecision | None) -> bool:
        return (o.policy is not None and wd is not None and o.policy.resize_by is ResizeBy.IN_PLACE
                and self.decider.applies(o))

    def _reapply_in_place(self, o: Observed, wd: WorkloadDecision, errors: list[str]) -> None:
        """New pods start at the template value: resize the pods that differ from the value
        the others run (the last applied decision). Not a new change: no budget, no cooldown."""
        want = {d.container: CpuChange(request_m=d.current_m, limit_m=d.limit_m)
                for d in wd.decisions if d.current_m is not None}
        assert o.workload is not None and o.policy is not None
        try:
            if self._resize_pods(o.workload, want, pods=o.pods):
                self._hook("after-patch")
        except KubeError as exc:
            self.telemetry.patch_errors.labels(kind=type(exc).__name__).inc()
            errors.append(f"re-applying {o.policy.workload_key} to new pods: {exc}")

    def _resize_in_place(self, workload: Workload, wd: WorkloadDecision, now: datetime) -> Workload:
        """Resize the running pods one at a time (the template stays as it is); pods
        already at the new values are skipped, so a re-run after a crash resizes only
        the rest."""
        if self._resize_pods(workload, changes_of(wd), pods=None):
            # the change time goes on the workload (metadata only, nothing rolls) right
            # after the resizes, so a crash before the status write keeps the cooldown
            workload = self._record_last_change(workload, now)
            self._hook("after-patch")
        return workload

    def _record_last_change(self, workload: Workload, now: datetime) -> Workload:
        for _ in range(max(1, self.conflict_attempts)):
            try:
                return self.kube.annotate_workload(workload, _annotations(now))
            except KubeConflict:
                workload = self.kube.read_workload(workload.namespace, workload.kind, workload.name)
        return workload

    def _resize_pods(self, workload: Workload, changes: Mapping[str, CpuChange], *,
                     pods: Sequence[Pod] | None) -> int:
        """Resize the pods that differ from ``changes``; returns how many were resized."""
        todo = []
        listed = self.kube.list_pods(workload) if pods is None else pods
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


def _annotations(now: datetime) -> dict[str, str | None]:
    return {LAST_CHANGE_ANNOTATION: format_time(now)}


def _refreshed(inputs: Sequence[ContainerInput], workload: Workload) -> tuple[ContainerInput, ...]:
    """After a re-read: same rates and sizing, new current requests/limits."""
    by_name = {c.name: c for c in workload.containers}
    return tuple(replace(i, request_m=by_name[i.name].cpu_request_m, limit_m=by_name[i.name].cpu_limit_m)
                 for i in inputs if i.name in by_name)
