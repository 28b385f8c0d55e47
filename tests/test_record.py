"""The record stage (controller/stages/record.py) is pure: status, Events and review rows
from an observation and a decision, with no adapter — so it is tested with values only.

- The status it builds is validated by the CRD's status model (``policy.SizingPolicyStatus``)
  before anything is written; a status that does not fit is refused with a message.
- A partial observation (the workload's LIST failed) builds no status and no Event:
  the stored status stays (Kubernetes API conventions: status reports observed state —
  what was not observed is not reported as gone).
- Level-based comparison: only the rows' wording changed → the status is current.
- Conditions say what they mean (issue 10): Ready is not True when every container is
  held for missing inputs; InputsAvailable names what is missing; Conflict is True on
  the newer of two policies naming one workload, which is held with one Warning Event
  naming the older. effectiveMode is DryRun under ``run --dry-run``. Proposal Events
  are recorded regarding the workload and regarding the policy (related: the other).
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
OLD_STATUS = {"observedGeneration": 1, "containers": [{"name": "app", "verdict": "Held", "reason": "NoMetrics"}]}


def _observed(mode: str = "DryRun", **kw: object) -> Observed:
    body = policy("shop", "web", workload="web", mode=mode, containers=[{"name": "app", "model": "shop/web/app"}])
    obj = PolicyObject(namespace="shop", name="web", uid="u1", generation=1, resource_version="7",
                       spec=body["spec"], status=OLD_STATUS)
    body["metadata"]["generation"] = 1
    return Observed(obj=obj, policy=parse_policy(body), **kw)  # type: ignore[arg-type]


def test_unavailable_workload_keeps_the_status_and_emits_nothing() -> None:
    o = _observed(problem="listing Deployments in shop failed: 503", unavailable=True)
    assert new_status(o, None, NOW) is None
    assert events_for(o, None, None, OLD_STATUS, NOW) == []
    (row,) = review_rows(o, None, dry_run=False)
    assert (row.verdict, row.why) == ("Held", ("ApiUnavailable",))


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
    assert status is not None and status["containers"][0]["verdict"] == "Proposed"  # type: ignore[index]
    assert status["containers"][0]["newRequest"] == "315m"  # type: ignore[index]  # 0.27 × 1.15 = 310.5 → 315
    assert (status["effectiveMode"], status["summary"]) == ("DryRun", "1 proposed")
    assert validate_status(status, where="shop/web") is status
    reworded = {**status, "containers": [{**p, "message": "other words"} for p in status["containers"]]}  # type: ignore[union-attr]
    assert status_is_current(status, reworded)
    assert not status_is_current(status, OLD_STATUS)
    (ev,) = events_for(o, wd, None, OLD_STATUS, NOW)
    assert ev.reason == "CpuRequestProposed" and ev.note.endswith("(DryRun: nothing changed)")
    assert ev.action == "Rollout"


def test_a_status_that_does_not_fit_the_crd_is_refused() -> None:
    with pytest.raises(StatusInvalid, match="does not fit the CRD at containers"):
        validate_status({"containers": [{"name": "app", "verdict": "Held", "reason": "NoMetrics", "extra": 1}]},
                        where="shop/web")
    with pytest.raises(StatusInvalid, match="does not fit the CRD at containers"):
        validate_status({"containers": [{"name": "app", "verdict": "held", "reason": "NoMetrics"}]}, where="shop/web")


def _conditions(status: dict) -> dict[str, dict]:
    return {c["type"]: c for c in status["conditions"]}


def test_ready_is_false_when_every_container_lacks_inputs() -> None:
    o = _observed()
    assert o.policy is not None
    wd = decide_workload(o.policy, [ContainerInput("app", 100, None, None, None)], history=WorkloadHistory(),
                         now=NOW, dry_run=True)
    status = new_status(o, wd, NOW)
    assert status is not None and validate_status(status, where="shop/web") is status
    conds = _conditions(status)
    assert (conds["Ready"]["status"], conds["Ready"]["reason"]) == ("False", "InputsMissing")
    assert (conds["InputsAvailable"]["status"], conds["InputsAvailable"]["reason"]) == ("False", "NoMetrics")
    assert "app" in conds["InputsAvailable"]["message"]
    assert (conds["Conflict"]["status"], status["summary"]) == ("False", "1 held")
    (row,) = status["containers"]
    assert (row["verdict"], row["reason"]) == ("Held", "NoMetrics") and "newRequest" not in row


def test_no_model_is_named_in_the_inputs_condition() -> None:
    body = policy("shop", "web", workload="web", mode="DryRun", containers=[
        {"name": "app", "model": "shop/web/app"}, {"name": "sidecar", "model": "shop/web/sidecar"}])
    body["metadata"]["generation"] = 1
    obj = PolicyObject(namespace="shop", name="web", uid="u1", generation=1, resource_version="7",
                       spec=body["spec"], status={})
    o = Observed(obj=obj, policy=parse_policy(body))
    assert o.policy is not None
    wd = decide_workload(o.policy, [ContainerInput("app", 100, None, 50.0, Sizing(0.25, 0.27)),
                                    ContainerInput("sidecar", 100, None, 50.0, None)],
                         history=WorkloadHistory(), now=NOW, dry_run=True)
    status = new_status(o, wd, NOW)
    assert status is not None
    conds = _conditions(status)
    # one container still has its inputs: Ready stays True, InputsAvailable says what is missing
    assert conds["Ready"]["status"] == "True"
    assert (conds["InputsAvailable"]["status"], conds["InputsAvailable"]["reason"]) == ("False", "NoModel")
    assert "sidecar" in conds["InputsAvailable"]["message"] and "shop/web/sidecar" in conds["InputsAvailable"]["message"]
    assert status["summary"] == "1 proposed, 1 held"


def test_effective_mode_is_dry_run_under_run_dry_run() -> None:
    o = _observed(mode="Apply")
    assert o.policy is not None
    wd = decide_workload(o.policy, [ContainerInput("app", 100, None, 50.0, Sizing(0.25, 0.27))],
                         history=WorkloadHistory(), now=NOW, dry_run=True)
    assert new_status(o, wd, NOW, dry_run=True)["effectiveMode"] == "DryRun"  # type: ignore[index]
    assert new_status(o, wd, NOW, dry_run=False)["effectiveMode"] == "Apply"  # type: ignore[index]


def test_proposal_events_regard_the_workload_and_the_policy() -> None:
    from ratefit.controller.workload import ObjectRef

    o = _observed()
    assert o.policy is not None
    wd = decide_workload(o.policy, [ContainerInput("app", 100, None, 50.0, Sizing(0.25, 0.27))],
                         history=WorkloadHistory(), now=NOW, dry_run=True)

    class W:  # only the reference of the workload is read
        ref = ObjectRef("apps/v1", "Deployment", "shop", "web", "w1")

    evs = events_for(o, wd, W(), OLD_STATUS, NOW)  # type: ignore[arg-type]
    assert [(e.regarding.kind, e.related.kind, e.reason) for e in evs] == [
        ("Deployment", "SizingPolicy", "CpuRequestProposed"), ("SizingPolicy", "Deployment", "CpuRequestProposed")]
    assert evs[0].note == evs[1].note and evs[0].action == evs[1].action == "Rollout"


def test_the_newer_of_two_policies_is_held_with_a_conflict_condition_and_one_warning() -> None:
    from ratefit.controller.decide import Why, held_by_conflict

    o = _observed(conflict_with="shop/first")
    assert o.policy is not None
    inputs = [ContainerInput("app", 100, None, 50.0, Sizing(0.25, 0.27))]
    wd = held_by_conflict(o.policy, inputs, history=WorkloadHistory(), older="shop/first")
    status = new_status(o, wd, NOW)
    assert status is not None and validate_status(status, where="shop/web") is status
    conds = _conditions(status)
    assert (conds["Conflict"]["status"], conds["Conflict"]["reason"]) == ("True", "PolicyConflict")
    assert "shop/first" in conds["Conflict"]["message"]
    assert (conds["Ready"]["status"], conds["Ready"]["reason"]) == ("False", "PolicyConflict")
    (row,) = status["containers"]
    assert (row["verdict"], row["reason"]) == ("Held", Why.POLICY_CONFLICT.value) and "newRequest" not in row
    (ev,) = events_for(o, wd, None, OLD_STATUS, NOW)
    assert (ev.reason, ev.type.value, ev.regarding.kind) == ("PolicyConflict", "Warning", "SizingPolicy")
    assert "shop/first" in ev.note
    # once the status says so, the Warning is not repeated
    assert events_for(o, wd, None, status, NOW) == []


def test_an_invalid_policy_keeps_the_settle_history() -> None:
    from ratefit.controller.policy import PolicyInvalid

    old = {"lastChangeTime": "2026-03-01T10:00:00Z", "containers": [
        {"name": "app", "current": "500m", "newRequest": "400m", "verdict": "Proposed", "reason": "NewTarget",
         "belowSinceTime": "2026-03-01T11:00:00Z", "peakTarget": "400m"}]}
    body = policy("shop", "web", workload="web", containers=[{"name": "app", "model": "shop/web/app"}])
    obj = PolicyObject(namespace="shop", name="web", uid="u1", generation=2, resource_version="8",
                       spec=body["spec"], status=old)
    o = Observed(obj=obj, invalid=PolicyInvalid("spec.headroomPercent", "must be between 0 and 1000"))
    status = new_status(o, None, NOW)
    assert status is not None and validate_status(status, where="shop/web") is status
    (row,) = status["containers"]
    assert (row["verdict"], row["reason"], row["belowSinceTime"], row["peakTarget"]) == (
        "Held", "PolicyInvalid", "2026-03-01T11:00:00Z", "400m")
    assert "newRequest" not in row and status["lastChangeTime"] == "2026-03-01T10:00:00Z"
    assert status["summary"] == "policy invalid" and "effectiveMode" not in status


def test_conflicts_pick_the_older_by_creation_time_then_name() -> None:
    from ratefit.controller.stages.observe import conflicts

    def one(name: str, created: str, workload: str = "web") -> tuple[PolicyObject, object]:
        body = policy("shop", name, workload=workload, containers=[{"name": "app", "model": "shop/web/app"}])
        obj = PolicyObject(namespace="shop", name=name, uid=name, generation=1, resource_version="1",
                           spec=body["spec"], status={}, created=created)
        return obj, parse_policy(body)

    got = conflicts([one("a", "2026-03-01T12:00:05Z"), one("z", "2026-03-01T12:00:00Z"),
                     one("m", "2026-03-01T12:00:05Z"), one("alone", "2026-03-01T11:00:00Z", workload="api")])
    # z is the oldest; a and m have the same time: the name decides the order, both are held
    assert got == {("shop", "a"): "shop/z", ("shop", "m"): "shop/z"}
    assert conflicts([one("a", "2026-03-01T12:00:05Z")]) == {}
