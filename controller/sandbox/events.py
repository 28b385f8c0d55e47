"""One store, two views of Events: core/v1 `Event` and events.k8s.io/v1 `Event`.

As in a real API server, both APIs read and write the same objects, so an event a
controller writes through events.k8s.io/v1 shows in `kubectl get events` and
`kubectl describe`. Objects are stored in the core/v1 shape; the field mapping
is the one of Kubernetes' events/v1 conversion (regarding ↔ involvedObject,
note ↔ message, reportingController ↔ reportingComponent, deprecatedCount ↔ count,
deprecatedFirstTimestamp/LastTimestamp ↔ firstTimestamp/lastTimestamp,
deprecatedSource ↔ source).
"""

from __future__ import annotations

from typing import Any

#: events.k8s.io/v1 field -> core/v1 field
_MAP = {
    "regarding": "involvedObject",
    "note": "message",
    "reportingController": "reportingComponent",
    "deprecatedCount": "count",
    "deprecatedFirstTimestamp": "firstTimestamp",
    "deprecatedLastTimestamp": "lastTimestamp",
    "deprecatedSource": "source",
}
_BACK = {v: k for k, v in _MAP.items()}


def to_core(obj: dict[str, Any]) -> dict[str, Any]:
    out = {_MAP.get(k, k): v for k, v in obj.items()}
    out["apiVersion"], out["kind"] = "v1", "Event"
    return out


def to_events_v1(obj: dict[str, Any]) -> dict[str, Any]:
    out = {_BACK.get(k, k): v for k, v in obj.items()}
    out["apiVersion"], out["kind"] = "events.k8s.io/v1", "Event"
    return out
