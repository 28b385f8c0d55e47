"""The record stage (controller/stages/record.py) is pure: status, Events and review rows
from an observation and a decision, with no adapter — so it is tested with values only.

- The status it builds is validated by the CRD's status model (``policy.SizingPolicyStatus``)
  before anything is written; a status that does not fit is refused with a message.
- A partial observation (the workload's LIST failed) builds no status and no Event:
  the stored status stays (Kubernetes API conventions: status reports observed state —
  what was not observed is not reported as gone).
- Level-based comparison: only the proposals' wording changed → the status is current.
"""

from __future__ import annotations

from datetime import datetime, timezone

import pytest

from reconcile_fixtures import policy
from ratefit.controller.decide import ContainerInput, Sizing, decide_workload
from ratefit.controller.policy import WorkloadHistory, parse_policy
from ratefit.controller.stages.observe import Observed
from ratefit.controller.stages.record import (
    StatusInvalid,
    events_for,
    new_status,
    review_rows,
    status_is_current,
    validate_status,
)
from ratefit.controller.workload import PolicyObject

NOW = datetime(2026, 3, 1, 12, 0, tzinfo=timezone.utc)
OLD_STATUS = {"observedGeneration": 1, "proposals": [{"container": "app", "verdict": "held", "why": "NoMetrics"}]}


def _observed(**kw: object) -> Observed:
    body = policy("shop", "web", workload="web", mode="DryRun", containers=[{"name": "app", "model": "shop/web/app"}])
    obj = PolicyObject(namespace="shop", name="web", uid="u1", generation=1, resource_version="7",
                       spec=body["spec"], status=OLD_STATUS)
    body["metadata"]["generation"] = 1
    return Observed(obj=obj, policy=parse_policy(body), **kw)  # type: ignore[arg-type]


def test_unavailable_workload_keeps_the_status_and_emits_nothing() -> None:
    o = _observed(problem="listing Deployments in shop failed: 503", unavailable=True)
    assert new_status(o, None, NOW) is None
    assert events_for(o, None, None, OLD_STATUS, NOW) == []
    (row,) = review_rows(o, None, dry_run=False)
    assert (row.verdict, row.why) == ("held", ("ApiUnavailable",))


def test_missing_workload_is_not_found_with_one_warning() -> None:
    o = _observed(problem="shop/Deployment/web not found")
    status = new_status(o, None, NOW)
    assert status is not None
    ready = status["conditions"][0]  # type: ignore[index]
    assert (ready["type"], ready["status"], ready["reason"]) == ("Ready", "False", "WorkloadNotFound")
    (ev,) = events_for(o, None, None, OLD_STATUS, NOW)
    assert (ev.reason, ev.type.value) == ("WorkloadNotFound", "Warning")


def test_decided_status_fits_the_status_model_and_a_reworded_one_is_current() -> None:
    o = _observed()
    assert o.policy is not None
    wd = decide_workload(o.policy, [ContainerInput("app", 100, None, 50.0, Sizing(0.25, 0.27))],
                         history=WorkloadHistory(), now=NOW, dry_run=True)
    status = new_status(o, wd, NOW)
    assert status is not None and status["proposals"][0]["verdict"] == "proposed"  # type: ignore[index]
    assert validate_status(status, where="shop/web") is status
    reworded = {**status, "proposals": [{**p, "message": "other words"} for p in status["proposals"]]}  # type: ignore[union-attr]
    assert status_is_current(status, reworded)
    assert not status_is_current(status, OLD_STATUS)
    (ev,) = events_for(o, wd, None, OLD_STATUS, NOW)
    assert ev.reason == "CpuRequestProposed" and ev.note.endswith("(dry-run: nothing changed)")


def test_a_status_that_does_not_fit_the_crd_is_refused() -> None:
    with pytest.raises(StatusInvalid, match="does not fit the CRD at proposals"):
        validate_status({"proposals": [{"container": "app", "verdict": "held", "why": "NoMetrics", "extra": 1}]},
                        where="shop/web")
