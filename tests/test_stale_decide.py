"""A stale model in the decision (controller/decide.py with a controller/staleness verdict):
decreases are held with ModelStale, increases still go — driven by observed usage when the
curve under-predicts — and no settling record builds up on a stale curve's word.
Rule: issue 13, "Watched in production" (decreases held while stale; increases go)."""

from __future__ import annotations

from decide_fixtures import NOW, make_policy
from ratefit.controller.decide import ContainerInput, Sizing, Verdict, Why, decide_workload
from ratefit.controller.policy import ContainerHistory, WorkloadHistory
from ratefit.controller.staleness import Staleness

STALE = Staleness(samples=72, above=40, nominal=0.05, p_value=1e-20, usage_p95=0.5)
FRESH = Staleness(samples=72, above=3, nominal=0.05, p_value=0.5, usage_p95=0.5)


def one(request: int, upper: float, stale: Staleness | None, history: WorkloadHistory = WorkloadHistory()):
    p = make_policy(headroomPercent=15, deadbandPercent=10, settle="0s")
    wd = decide_workload(p, [ContainerInput("app", request, None, 10.0, Sizing(upper * 0.8, upper), stale=stale)],
                         history=history, now=NOW)
    return wd.decisions[0]


def test_a_decrease_is_held_model_stale_with_the_ratio_in_the_message() -> None:
    assert one(1000, 0.3, FRESH).verdict is Verdict.CHANGED  # the same input, fresh: the decrease goes
    d = one(1000, 0.3, STALE)
    assert (d.verdict, d.why) == (Verdict.HELD, Why.MODEL_STALE)
    assert d.proposed_m == 1000 and "exceedance ratio 0.556" in d.message
    assert d.settle == ContainerHistory()  # no settling record while stale


def test_usage_above_the_request_drives_an_increase() -> None:
    # the curve says 0.3 cores (a decrease), usage p95 is 0.5 cores: target 0.5 × 1.15 = 575m
    d = one(400, 0.3, STALE)
    assert d.verdict is Verdict.CHANGED and d.proposed_m == 575 and d.target_m == 575
    assert "model stale" in d.message


def test_an_increase_from_the_curve_still_goes() -> None:
    d = one(500, 0.8, STALE)  # the curve asks more than usage: 0.8 × 1.15 = 920m (within the ×2 step limit)
    assert d.verdict is Verdict.CHANGED and d.proposed_m == 920


def test_stale_inside_the_deadband_says_model_stale() -> None:
    d = one(580, 0.3, STALE)  # usage target 575m is within 10 % of 580m
    assert (d.verdict, d.why) == (Verdict.HELD, Why.MODEL_STALE)


def test_an_image_change_alone_marks_stale() -> None:
    img = Staleness(samples=0, above=0, nominal=0.05, p_value=1.0, image_changed="image changed from a:1 to a:2")
    d = one(1000, 0.3, img)
    assert d.why is Why.MODEL_STALE and "a:2" in d.message
