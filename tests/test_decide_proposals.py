"""DryRun proposals stand while the rates move less than the deadband (decide.py step 8).

In DryRun the current request never changes, so without this every small move of the
rates gave a new proposed request, a rewritten status row and a CpuRequestProposed
Event — at 10,000 policies, a rates refresh moving every rate by 2 % made 2,484 Events
and 10,000 status writes in one pass (tests/bench/bench_cache.py, 2026-12-02). The
deadband is the policy's own rule for "a change not worth making" (DESIGN.md, "One
decision", step 3); here it also decides when a proposal is worth announcing again.

The passes below go through the real record stage (status, Events) and read the history
back from the status as the next pass does. Figures: headroom 15 % (the default), target
= ceil to 5m of upper × 1.15; the INVENTED policy is the decide tests' label-printer.
"""

from __future__ import annotations

from datetime import timedelta

from decide_fixtures import NOW, decide_one, make_policy
from ratefit.controller.decide import Verdict
from ratefit.controller.policy import WorkloadHistory, history_from_status
from ratefit.controller.workload import PolicyObject
from ratefit.controller.stages.observe import Observed
from ratefit.controller.stages.record import events_for, new_status


def _pass(policy, status: dict, upper: float, *, dry_run: bool = True, request: int = 100):
    """One pass: decide from the history the status holds, then the status and Events the
    record stage makes of it."""
    obj = PolicyObject(namespace="parcels", name="label-printer", uid="u1", generation=1, resource_version="1",
                       spec={}, status=status)
    o = Observed(obj=obj, policy=policy)
    wd = decide_one(policy, request=request, upper=upper, history=history_from_status(status), dry_run=dry_run,
                    now=NOW + timedelta(minutes=len(status.get("containers") or [])))
    new = new_status(o, wd, NOW, dry_run=dry_run)
    assert new is not None
    return wd.decisions[0], new, events_for(o, wd, None, status, NOW)


def test_a_proposal_stands_while_the_target_moves_inside_the_deadband() -> None:
    p = make_policy(mode="DryRun")  # deadbandPercent 10 (the default)
    d, status, events = _pass(p, {}, 0.14)  # 0.14 × 1.15 = 0.161 → 165m
    assert (d.verdict, d.proposed_m) == (Verdict.PROPOSED, 165)
    assert [e.reason for e in events] == ["CpuRequestProposed"]
    assert status["containers"][0]["newRequest"] == "165m"

    # the rates move a little: 0.143 → 165m anyway; 0.15 → 175m, 10m from 165m (deadband 16.5m)
    for upper in (0.143, 0.15):
        d, status2, events = _pass(p, status, upper)
        assert (d.verdict, d.proposed_m, d.target_m) == (Verdict.PROPOSED, 165, 165 if upper == 0.143 else 175)
        assert events == []  # a proposal already in the status is not news
        assert status2["containers"][0]["newRequest"] == "165m"
        if upper == 0.15:
            assert "the proposal of 165m stands: 175m is within its deadband" in d.message
    assert history_from_status(status2).container("app").proposed_m == 165

    # 0.17 → 200m: 35m from the proposal, more than its 10 % → a new proposal, announced
    d, status3, events = _pass(p, status2, 0.17)
    assert (d.proposed_m, status3["containers"][0]["newRequest"]) == (200, "200m")
    assert [e.reason for e in events] == ["CpuRequestProposed"] and "raise to 200m" in events[0].note
    # back to 0.15 → 175m: 25m from 200m, more than 20m → follows
    d, _, events = _pass(p, status3, 0.15)
    assert d.proposed_m == 175 and len(events) == 1


def test_a_move_to_the_other_side_of_the_request_is_a_new_proposal() -> None:
    """A raise standing as the proposal, then a target below the current request: the
    proposal is a decrease now (after settle), never the old raise."""
    p = make_policy(mode="DryRun", settle="0s", deadbandPercent=50)
    _, status, _ = _pass(p, {}, 0.11, request=120)  # 0.1265 → 130m: only 10m above 120m (50 % deadband: held)
    hist = history_from_status(status)
    assert hist.container("app").proposed_m is None  # a held row proposes nothing
    _, status, _ = _pass(p, {}, 0.2, request=120)  # 230m: a raise
    assert history_from_status(status).container("app").proposed_m == 230
    d, _, _ = _pass(p, status, 0.05, request=120)  # 57.5 → 60m, a decrease of 60m (50 % of 120m: not above)
    assert d.verdict is Verdict.HELD and d.proposed_m != 230
    # 46 → 50m: a decrease of 70m, cut to 60m by stepLimit.maxDecreasePercent 50 (the
    # default; step 5) — proposed although 230m stood (the other side of the request)
    d, status, events = _pass(p, status, 0.04, request=120)
    assert (d.verdict, d.proposed_m) == (Verdict.PROPOSED, 60) and len(events) == 1


def test_apply_mode_is_not_touched() -> None:
    """Apply changes the request; the next decision's deadband is around the new request
    (step 3). A proposal in the status from an earlier DryRun does not hold a change back."""
    p = make_policy(mode="Apply")
    _, status, _ = _pass(p, {}, 0.14)  # DryRun (ratefit run --dry-run): 165m proposed
    d, _, _ = _pass(p, status, 0.15, dry_run=False)
    assert (d.verdict, d.proposed_m) == (Verdict.CHANGED, 175)


def test_the_history_carries_the_proposal_through_the_status_text() -> None:
    p = make_policy(mode="DryRun")
    _, status, _ = _pass(p, {}, 0.14)
    wd = decide_one(p, request=100, upper=0.15, history=history_from_status(status), dry_run=True)
    # what the status will show is what the history says: the steady-state reuse
    # (controller/stages/steady.py) and the replay's carried history compare these
    assert wd.history.container("app").proposed_m == wd.decisions[0].proposed_m == 165
    assert history_from_status(status) == WorkloadHistory(containers=dict(wd.history.containers))
