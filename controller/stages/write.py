"""Write what the record stage built: the status (through the status subresource,
only when it says something new, and only once the CRD's status model accepted it),
then the Events and the decision log lines.

A failed status write (409: someone edited the policy) is counted and left for the
next pass, which re-reads the policy; a failed Event is logged and never fails a pass.

A status that differs from the stored one only in figures (the rate, demand, band and
target a pass saw: ``record.figures_only``) is written at most once per ``figures_every_s``
per policy (``ratefit run --status-figures-every``, default 5m; each policy's period is
stretched by up to half, by a hash of its uid, so the writes of many policies spread out
instead of falling due in the same pass). Rates move a little at every refresh: without
this, every pass rewrote nearly every status (10,000 writes in a pass at 10,000 policies,
tests/bench/bench_cache.py). A decision, a reason, a request, a condition's status or the
settling history is written at once; the first pass of a process writes what differs.
A deferred policy is decided again next pass (the steady-state memo keeps only policies
whose status was current), so the figures reach the status once its period is over.
"""

from __future__ import annotations

import json
import logging
import time
import zlib
from collections.abc import Callable
from datetime import datetime

from ratefit.controller.errors import KubeError
from ratefit.controller.stages.act import Acted
from ratefit.controller.stages.ports import KubeWriter
from ratefit.controller.stages.record import (
    StatusInvalid,
    decision_records,
    events_for,
    figures_only,
    new_status,
    status_is_current,
    validate_status,
)
from ratefit.controller.telemetry import Telemetry

__all__ = ["RecordWriter"]

log = logging.getLogger("ratefit.controller.reconcile")
#: decisions go to their own logger as one JSON object per line
decision_log = logging.getLogger("ratefit.decisions")


class RecordWriter:
    """Writes one policy's status, Events and decision log lines."""

    def __init__(self, *, kube: KubeWriter, telemetry: Telemetry, dry_run: bool = False,
                 figures_every_s: float = 0.0, monotonic: Callable[[], float] = time.monotonic) -> None:
        if figures_every_s < 0:
            raise ValueError(f"figures_every_s must be 0 (off) or positive, got {figures_every_s}")
        self.kube = kube
        self.telemetry = telemetry
        self.dry_run = dry_run
        self.figures_every_s = float(figures_every_s)
        self._mono = monotonic
        #: policy uid → monotonic time of its last status write (this process)
        self._written: dict[str, float] = {}
        #: after :meth:`write`: True when the stored status already said everything (nothing written)
        self.was_current = False
        #: status writes deferred because only figures changed (since the start)
        self.deferred = 0

    def period(self, uid: str) -> float:
        """The figures period of one policy: ``figures_every_s`` × [1, 1.5), by its uid."""
        return self.figures_every_s * (1.0 + (zlib.crc32(uid.encode()) % 1000) / 2000.0)

    def _defer(self, uid: str, new: dict[str, object], old: dict[str, object]) -> bool:
        if self.figures_every_s <= 0 or not uid:
            return False
        last = self._written.get(uid)
        if last is None or self._mono() - last >= self.period(uid):
            return False
        return figures_only(new, old)

    def _wrote(self, uid: str) -> None:
        if not uid or self.figures_every_s <= 0:
            return
        now = self._mono()
        self._written[uid] = now
        if len(self._written) > 200_000:  # deleted policies: forget what can no longer defer anything
            horizon = 1.5 * self.figures_every_s
            self._written = {u: t for u, t in self._written.items() if now - t < horizon}

    def write(self, a: Acted, now: datetime, errors: list[str]) -> tuple[int, int]:
        """(status writes, events) for one policy."""
        o = a.observed
        self.was_current = False
        new = new_status(o, a.decision, now, dry_run=self.dry_run)
        old = dict(o.obj.status or {})
        if new is None or status_is_current(new, old):
            self.was_current = new is not None
            return 0, 0  # level-based: nothing to say that the status does not already say
        if self._defer(o.obj.uid, new, old):
            self.deferred += 1
            self.telemetry.status_writes.labels(outcome="deferred").inc()
            return 0, 0  # only figures moved, and this policy's were written less than a period ago
        try:
            validate_status(new, where=f"{o.obj.namespace}/{o.obj.name}")
        except StatusInvalid as exc:  # a bug: say so, write nothing, keep passing
            errors.append(str(exc))
            log.error("%s", exc)
            return 0, 0
        try:
            self.kube.write_policy_status(o.obj.namespace, o.obj.name, new,
                                          resource_version=o.obj.resource_version or None)
        except KubeError as exc:  # 409: someone edited the policy; the next pass re-reads it
            self.telemetry.kube_errors.labels(kind=type(exc).__name__).inc()
            errors.append(f"status of {o.obj.namespace}/{o.obj.name}: {exc}")
            return 0, 0
        self._wrote(o.obj.uid)
        self.telemetry.status_writes.labels(outcome="written").inc()
        debug = decision_log.isEnabledFor(logging.DEBUG)
        for changed, record in decision_records(o, a.decision, old, dry_run=self.dry_run):
            if changed or debug:
                decision_log.log(logging.INFO if changed else logging.DEBUG, json.dumps(record, sort_keys=True))
        events = 0
        for ev in events_for(o, a.decision, a.workload, old, now):
            try:
                self.kube.emit_event(regarding=ev.regarding, related=ev.related, reason=ev.reason, type=ev.type,
                                     action=ev.action, note=ev.note)
                events += 1
            except KubeError as exc:
                self.telemetry.kube_errors.labels(kind=type(exc).__name__).inc()
                log.warning("event for %s/%s not written: %s", o.obj.namespace, o.obj.name, exc)
        return 1, events
