"""Write what the record stage built: the status (through the status subresource,
only when it says something new, and only once the CRD's status model accepted it),
then the Events and the decision log lines.

A failed status write (409: someone edited the policy) is counted and left for the
next pass, which re-reads the policy; a failed Event is logged and never fails a pass.
"""

from __future__ import annotations

import json
import logging
from datetime import datetime

from ratefit.controller.errors import KubeError
from ratefit.controller.stages.act import Acted
from ratefit.controller.stages.ports import KubeWriter
from ratefit.controller.stages.record import (
    StatusInvalid,
    decision_records,
    events_for,
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

    def __init__(self, *, kube: KubeWriter, telemetry: Telemetry, dry_run: bool = False) -> None:
        self.kube = kube
        self.telemetry = telemetry
        self.dry_run = dry_run
        #: after :meth:`write`: True when the stored status already said everything (nothing written)
        self.was_current = False

    def write(self, a: Acted, now: datetime, errors: list[str]) -> tuple[int, int]:
        """(status writes, events) for one policy."""
        o = a.observed
        self.was_current = False
        new = new_status(o, a.decision, now, dry_run=self.dry_run)
        old = dict(o.obj.status or {})
        if new is None or status_is_current(new, old):
            self.was_current = new is not None
            return 0, 0  # level-based: nothing to say that the status does not already say
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
