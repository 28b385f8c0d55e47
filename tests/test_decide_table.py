"""The decision table: every verdict and every why reached by at least one case.

Expected values are worked by hand from DESIGN.md "One decision" (target = upper ×
(1 + headroom), clamped, rounded up to 5m; deadband > deadband × current and ≥ 10m;
settle; step limits; cooldown; budget; limits). Defaults: headroom 0.15, deadband 0.10,
stepLimit ×2 / ×0.5, cooldown 30m, settle 2h. upper 0.4 cores → target 460m.
Kubernetes fact used: a container with a limit and no request requests its limit
(Kubernetes docs, "Resource Management for Pods and Containers").
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import timedelta
from typing import Any

import pytest

from ratefit.controller.decide import ContainerInput, Sizing, Verdict, Why, decide_workload, held_by_conflict
from ratefit.controller.limits import BudgetView
from ratefit.controller.policy import ContainerHistory, WorkloadHistory, history_to_status
from decide_fixtures import NOW, decide_one, make_policy

H = timedelta(hours=1)
M = timedelta(minutes=1)


def settled(peak: int, since: timedelta = 3 * H) -> WorkloadHistory:
    return WorkloadHistory(containers={"app": ContainerHistory(below_since=NOW - since, peak_m=peak)})


@dataclass
class Case:
    name: str
    verdict: Verdict
    why: Why
    proposed: int | None
    proposed_limit: int | None = None
    spec: dict[str, Any] = field(default_factory=dict)
    container: dict[str, Any] = field(default_factory=dict)
    args: dict[str, Any] = field(default_factory=dict)


CASES = [
    Case("increase to the full target", Verdict.CHANGED, Why.NEW_TARGET, 460, 920, args=dict(request=400, limit=800)),
    Case("keep-ratio rounds the limit up to 1m", Verdict.CHANGED, Why.NEW_TARGET, 460, 1534, args=dict(request=300, limit=1000)),
    Case("inside the relative deadband", Verdict.HELD, Why.INSIDE_DEADBAND, 440, 800, args=dict(request=440, limit=800)),
    # current 52m, target 60m: 8m > 10 % of 52m but under the 10m minimum
    Case("inside the 10m absolute deadband", Verdict.HELD, Why.INSIDE_DEADBAND, 52, None, args=dict(request=52, upper=0.05)),
    Case("increase cut by stepLimit.up", Verdict.CHANGED, Why.STEP_LIMITED, 400, 800, args=dict(request=200, limit=400)),
    # the decrease is shown at its step-limited value while it waits
    Case("decrease waits for settle", Verdict.HELD, Why.SETTLING, 500, None, args=dict(request=1000)),
    Case("decrease waits: settle not over yet", Verdict.HELD, Why.SETTLING, 600, None,
         args=dict(request=1000, history=settled(600, since=H))),
    Case("decrease after settle goes to the peak target", Verdict.CHANGED, Why.NEW_TARGET, 600, None,
         args=dict(request=1000, history=settled(600))),
    Case("decrease after settle cut by stepLimit.down", Verdict.CHANGED, Why.STEP_LIMITED, 1000, None,
         args=dict(request=2000, history=settled(500))),
    Case("settled peak inside the deadband", Verdict.HELD, Why.INSIDE_DEADBAND, 1000, None,
         args=dict(request=1000, history=settled(950))),
    Case("raised to the floor", Verdict.CHANGED, Why.AT_FLOOR, 300, None, container=dict(floor="300m"),
         args=dict(request=200, upper=0.1)),
    Case("sits at the floor", Verdict.HELD, Why.AT_FLOOR, 500, None, container=dict(floor="500m"),
         args=dict(request=500, upper=0.1)),
    Case("cut to the ceiling", Verdict.CHANGED, Why.AT_CEILING, 1000, None, container=dict(ceiling="1"),
         args=dict(request=600, upper=2.0)),
    Case("sits at the ceiling", Verdict.HELD, Why.AT_CEILING, 1000, None, container=dict(ceiling="1"),
         args=dict(request=1000, upper=2.0)),
    Case("a ceiling that is no multiple of 5m wins over rounding", Verdict.CHANGED, Why.AT_CEILING, 1001, None,
         container=dict(ceiling="1001m"), args=dict(request=600, upper=0.9)),
    Case("limits keep: cut to the limit", Verdict.CHANGED, Why.AT_LIMIT, 600, 600, spec=dict(cpuLimit="Keep"),
         args=dict(request=400, limit=600, upper=1.0)),
    Case("limits keep: sits at the limit", Verdict.HELD, Why.AT_LIMIT, 600, 600, spec=dict(cpuLimit="Keep"),
         args=dict(request=600, limit=600, upper=1.0)),
    Case("limits keep below the limit", Verdict.CHANGED, Why.NEW_TARGET, 460, 2000, spec=dict(cpuLimit="Keep"),
         args=dict(request=400, limit=2000)),
    Case("limits drop removes the limit with the change", Verdict.CHANGED, Why.NEW_TARGET, 460, None,
         spec=dict(cpuLimit="Drop"), args=dict(request=400, limit=800)),
    Case("cooling down", Verdict.HELD, Why.COOLING_DOWN, 460, 920,
         args=dict(request=400, limit=800, history=WorkloadHistory(last_change=NOW - 10 * M))),
    Case("cooldown over", Verdict.CHANGED, Why.NEW_TARGET, 460, 920,
         args=dict(request=400, limit=800, history=WorkloadHistory(last_change=NOW - 30 * M))),
    Case("no changes left this minute", Verdict.HELD, Why.BUDGET_SPENT, 460, 920,
         args=dict(request=400, limit=800, budget=BudgetView(changes_left=0, rollouts_free=3))),
    Case("no rollout slot free", Verdict.HELD, Why.BUDGET_SPENT, 460, 920,
         args=dict(request=400, limit=800, budget=BudgetView(changes_left=5, rollouts_free=0))),
    Case("dry-run proposes", Verdict.PROPOSED, Why.NEW_TARGET, 460, 920, spec=dict(mode="DryRun"),
         args=dict(request=400, limit=800)),
    Case("--dry-run overrides apply", Verdict.PROPOSED, Why.STEP_LIMITED, 400, None, args=dict(request=200, dry_run=True)),
    Case("dry-run never waits for the budget", Verdict.PROPOSED, Why.NEW_TARGET, 460, None, spec=dict(mode="DryRun"),
         args=dict(request=400, budget=BudgetView(changes_left=0, rollouts_free=0))),
    Case("dry-run still cools down", Verdict.HELD, Why.COOLING_DOWN, 460, None, spec=dict(mode="DryRun"),
         args=dict(request=400, history=WorkloadHistory(last_change=NOW - M))),
    Case("extrapolated demand is held", Verdict.HELD, Why.EXTRAPOLATED, 400, None, args=dict(request=400, extrapolated=True)),
    Case("extrapolated demand allowed", Verdict.CHANGED, Why.NEW_TARGET, 460, None, spec=dict(allowExtrapolation=True),
         args=dict(request=400, extrapolated=True)),
    Case("no rate", Verdict.HELD, Why.NO_METRICS, 400, None, args=dict(request=400, rate=None)),
    Case("NaN rate", Verdict.HELD, Why.NO_METRICS, 400, None, args=dict(request=400, rate=math.nan)),
    Case("negative rate", Verdict.HELD, Why.NO_METRICS, 400, None, args=dict(request=400, rate=-1.0)),
    Case("no model", Verdict.HELD, Why.NO_MODEL, 400, None, args=dict(request=400, upper=None)),
    Case("unusable sizing answer", Verdict.HELD, Why.NO_MODEL, 400, None, args=dict(request=400, upper=math.inf)),
    Case("HPA on CPU utilisation", Verdict.HELD, Why.HORIZONTAL_CONFLICT, 460, None, args=dict(request=400, hpa_on_cpu=True)),
    # a decrease still settling is shown blocked at once, not after the settle period
    Case("HPA on CPU utilisation, decrease (step-limited to 0.5x)", Verdict.HELD, Why.HORIZONTAL_CONFLICT, 500, None,
         args=dict(request=1000, hpa_on_cpu=True)),
    Case("HPA conflict allowed", Verdict.CHANGED, Why.NEW_TARGET, 460, None, spec=dict(allowHorizontalConflict=True),
         args=dict(request=400, hpa_on_cpu=True)),
    Case("in-place: Guaranteed moves request and limit together", Verdict.CHANGED, Why.NEW_TARGET, 460, 460,
         spec=dict(resizeBy="InPlace"), args=dict(request=400, limit=400)),
    Case("in-place: limits keep would break request == limit", Verdict.HELD, Why.IN_PLACE_UNSUPPORTED, 600, 1000,
         spec=dict(resizeBy="InPlace", cpuLimit="Keep"), args=dict(request=1000, limit=1000, history=settled(600))),
    Case("in-place: no first request", Verdict.HELD, Why.IN_PLACE_UNSUPPORTED, 460, None, spec=dict(resizeBy="InPlace"),
         args=dict(request=None, limit=None)),
    Case("no request but a limit: requests its limit", Verdict.CHANGED, Why.NEW_TARGET, 600, 600,
         args=dict(request=None, limit=1000, history=settled(600))),
    Case("no request and no limit: the target at once", Verdict.CHANGED, Why.NEW_TARGET, 460, None,
         args=dict(request=None, limit=None)),
    Case("headroom 0 and rounding up to 5m", Verdict.CHANGED, Why.NEW_TARGET, 235, None, spec=dict(headroomPercent=0),
         args=dict(request=150, upper=0.2311)),
]


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_decision_table(case: Case):
    wd = decide_one(make_policy(case.container, **case.spec), **case.args)
    (d,) = wd.decisions
    assert (d.verdict, d.why) == (case.verdict, case.why), d.message
    assert d.proposed_m == case.proposed
    assert d.proposed_limit_m == case.proposed_limit
    assert d.message  # every decision says why in words
    if d.proposed_m is not None and d.proposed_limit_m is not None:
        assert d.proposed_m <= d.proposed_limit_m  # never request > limit
    assert (wd.changed == (d,)) == (d.verdict is Verdict.CHANGED)
    # lastChange moves exactly when something changed
    before = case.args.get("history", WorkloadHistory()).last_change
    assert wd.history.last_change == (NOW if d.verdict is Verdict.CHANGED else before)


def test_rejected_turns_changes_into_held_and_keeps_history():
    history = WorkloadHistory(last_change=NOW - 2 * H)
    wd = decide_one(make_policy(), request=400, limit=800, history=history)
    assert wd.changed and wd.history.last_change == NOW
    rej = wd.rejected('spec.template.spec.containers[0].resources.requests: Invalid value: "460m"')
    (d,) = rej.decisions
    assert (d.verdict, d.why) == (Verdict.HELD, Why.REJECTED)
    assert "Invalid value" in d.message and rej.changed == ()
    assert rej.history.last_change == NOW - 2 * H  # the cooldown does not start on a refused change


def test_rejected_decrease_keeps_its_settling_record():
    wd = decide_one(make_policy(), request=2000, history=settled(500))
    (d,) = wd.decisions
    assert d.why is Why.STEP_LIMITED and d.settle.below_since == NOW - 3 * H  # kept for the next step
    wd = decide_one(make_policy(), request=1000, history=settled(600))
    assert wd.decisions[0].settle == ContainerHistory()  # full target reached: settling over
    rej = wd.rejected("refused")
    assert rej.decisions[0].settle == ContainerHistory(below_since=NOW - 3 * H, peak_m=600)
    assert rej.history.container("app") == ContainerHistory(below_since=NOW - 3 * H, peak_m=600)


def test_every_verdict_and_why_is_reached():
    seen_verdicts = {c.verdict for c in CASES}
    # Rejected: test_rejected_* above; ApiUnavailable: set by the observe stage when a LIST
    # fails (tests/test_faults_kube.py), never by the rules; the per-container input reasons
    # (QueryRefused … ContainerMissing): tests/test_blast_radius.py; PolicyConflict:
    # held_by_conflict (test_held_by_conflict below); PolicyInvalid and WorkloadNotFound:
    # written by the record stage (tests/test_record.py); ModelStale: tests/test_stale_decide.py
    seen_whys = {c.why for c in CASES} | {Why.REJECTED, Why.API_UNAVAILABLE, Why.QUERY_REFUSED, Why.QUERY_FAILED,
                                          Why.TOO_MANY_SERIES, Why.INVALID_MODEL_KEY, Why.DEMAND_OUT_OF_RANGE,
                                          Why.CONTAINER_MISSING, Why.POLICY_CONFLICT, Why.POLICY_INVALID,
                                          Why.WORKLOAD_NOT_FOUND, Why.MODEL_STALE}
    assert seen_verdicts == set(Verdict)
    assert seen_whys == set(Why), set(Why) - seen_whys


def test_settling_record_starts_and_peaks():
    p = make_policy()
    wd = decide_one(p, request=1000, upper=0.4)
    assert wd.decisions[0].settle == ContainerHistory(below_since=NOW, peak_m=460)
    wd2 = decide_one(p, request=1000, upper=0.5, history=wd.history, now=NOW + 10 * M)
    assert wd2.decisions[0].settle == ContainerHistory(below_since=NOW, peak_m=575)  # 0.5 × 1.15 = 575
    wd3 = decide_one(p, request=1000, upper=0.3, history=wd2.history, now=NOW + 20 * M)
    assert wd3.decisions[0].settle.peak_m == 575  # the peak never drops while settling
    # a target back at or above the current request ends the settling
    wd4 = decide_one(p, request=1000, upper=0.9, history=wd3.history, now=NOW + 30 * M)
    assert wd4.decisions[0].settle == ContainerHistory()
    status = history_to_status(wd3.history, [d.to_status() for d in wd3.decisions])
    (row,) = status["containers"]
    assert (row["name"], row["belowSinceTime"], row["peakTarget"]) == ("app", "2026-12-01T12:00:00Z", "575m")
    assert row["verdict"] == "Held" and "newRequest" not in row  # a held row has no new value


def test_held_by_conflict():
    p = make_policy()
    history = WorkloadHistory(last_change=NOW - 60 * M, containers={"app": ContainerHistory(below_since=NOW, peak_m=300)})
    wd = held_by_conflict(p, [ContainerInput("app", 400, 800, 10.0, Sizing(0.3, 0.9))], history=history,
                          older="parcels/first")
    (d,) = wd.decisions
    assert (d.verdict, d.why, d.current_m, d.proposed_m) == (Verdict.HELD, Why.POLICY_CONFLICT, 400, 400)
    assert "parcels/first" in d.message and wd.changed == () and wd.history == history


def test_one_patch_per_workload_gates_all_containers():
    p = make_policy(
        containers=[
            {"name": "app", "model": "parcels/label-printer/app"},
            {"name": "log-shipper", "model": "parcels/label-printer/log-shipper"},
        ]
    )
    inputs = [
        ContainerInput("app", 400, 800, 10.0, Sizing(0.3, 0.4)),  # wants 460m
        ContainerInput("log-shipper", 100, None, 10.0, Sizing(0.08, 0.09)),  # 103.5 → 105: deadband
    ]
    wd = decide_workload(p, inputs, history=WorkloadHistory(), now=NOW)
    assert [(d.container, d.verdict, d.why) for d in wd.decisions] == [
        ("app", Verdict.CHANGED, Why.NEW_TARGET),
        ("log-shipper", Verdict.HELD, Why.INSIDE_DEADBAND),
    ]
    cooled = decide_workload(p, inputs, history=WorkloadHistory(last_change=NOW - 5 * M), now=NOW)
    assert [d.why for d in cooled.decisions] == [Why.COOLING_DOWN, Why.INSIDE_DEADBAND]
    # a container the workload does not have is held with its own reason (issue 9; it was
    # NoMetrics before), the others go on
    missing = decide_workload(p, inputs[:1], history=WorkloadHistory(), now=NOW)
    assert [d.why for d in missing.decisions] == [Why.NEW_TARGET, Why.CONTAINER_MISSING]
    assert "log-shipper" in missing.decisions[1].message


def test_second_pass_on_unchanged_world_does_nothing():
    # level-based: after the change is applied, the same rate and model give InsideDeadband
    p = make_policy()
    first = decide_one(p, request=400, limit=800)
    (d,) = first.changed
    second = decide_one(p, request=d.proposed_m, limit=d.proposed_limit_m, history=first.history, now=NOW + M)
    assert second.decisions[0].why is Why.INSIDE_DEADBAND and second.changed == ()


def test_status_entry():
    wd = decide_one(make_policy(), request=400, limit=800, rate=12.3456789, upper=0.4, demand=0.3121)
    entry = wd.decisions[0].to_status()
    assert entry == {
        "name": "app",
        "current": "400m",
        "newRequest": "460m",
        "target": "460m",
        "currentLimit": "800m",
        "newLimit": "920m",
        "demand": "313m",  # 0.3121 cores rounded up to whole millicores
        "demandBound": "400m",
        "rate": 12.345679,
        "extrapolated": False,
        "verdict": "Changed",
        "reason": "NewTarget",
        "message": "raise to 460m (target 460m)",
    }
    # held: no new value in the row (issue 10)
    held = decide_one(make_policy(), request=450, limit=800, upper=0.4).decisions[0].to_status()
    assert held["verdict"] == "Held" and "newRequest" not in held and "newLimit" not in held
