"""Properties of one decision, and the rate percentile against numpy (reference library).

- rate_percentile equals ``numpy.percentile(..., method="linear")`` (Hyndman & Fan 1996
  type 7, numpy's default).
- Never request > limit, whatever the limits mode (the API server refuses it with 422:
  DESIGN.md "Kubernetes facts"); keep-ratio keeps limit/request within rounding.
- A change stays between the current request and the target, within ×up/×down.
- Dry-run proposes exactly where apply changes.
"""

from __future__ import annotations

import math
from datetime import timedelta

import numpy as np
import pytest
from decide_fixtures import NOW, decide_one, make_policy
from hypothesis import given, settings
from hypothesis import strategies as st

from ratefit.controller.decide import Verdict, Why, limit_for, rate_percentile, target_millicores
from ratefit.controller.policy import ContainerHistory, CpuLimit, WorkloadHistory

rates = st.lists(st.floats(min_value=0.0, max_value=1e6, allow_nan=False), min_size=1, max_size=60)


@given(samples=rates, q=st.floats(min_value=0.0, max_value=100.0))
def test_percentile_matches_numpy_linear(samples, q):
    expected = float(np.percentile(np.array(samples), q, method="linear"))
    assert rate_percentile(samples, q) == pytest.approx(expected, rel=1e-9, abs=1e-9)


def test_percentile_examples_and_garbage():
    # Hyndman & Fan type 7 by hand: p95 of 1..10 = 9 + 0.55 × (10 − 9) = 9.55
    assert rate_percentile(range(1, 11), 95) == pytest.approx(9.55)
    assert rate_percentile([5.0], 95) == 5.0
    assert rate_percentile([], 95) is None
    assert rate_percentile([math.nan, -1.0, math.inf], 95) is None  # nothing usable
    assert rate_percentile([math.nan, 2.0, 4.0], 50) == 3.0  # NaN (stale pod) dropped
    with pytest.raises(ValueError):
        rate_percentile([1.0], 101)


def test_target_examples():
    # 0.4 cores × 1.15 = 460m; 0.2 × 1.15 = 229.999… in floats → 230m (not 235m)
    assert target_millicores(0.4, headroom=0.15, floor_m=10, ceiling_m=None) == (460, None)
    assert target_millicores(0.2, headroom=0.15, floor_m=10, ceiling_m=None) == (230, None)
    assert target_millicores(0.0, headroom=0.15, floor_m=10, ceiling_m=None) == (10, Why.AT_FLOOR)
    assert target_millicores(3.0, headroom=0.15, floor_m=10, ceiling_m=2000) == (2000, Why.AT_CEILING)
    assert target_millicores(1.0, headroom=0.0, floor_m=10, ceiling_m=None, limit_m=700) == (700, Why.AT_LIMIT)


settings_ = settings(max_examples=300, deadline=None)


@settings_
@given(
    request=st.integers(min_value=1, max_value=64_000),
    ratio=st.floats(min_value=1.0, max_value=10.0),
    upper=st.floats(min_value=0.0, max_value=64.0),
    headroom=st.integers(min_value=0, max_value=200),
    mode=st.sampled_from(["KeepRatio", "Keep", "Drop"]),
    up=st.integers(min_value=0, max_value=400),
    down=st.integers(min_value=0, max_value=95),
    settled=st.booleans(),
)
def test_never_request_above_limit(request, ratio, upper, headroom, mode, up, down, settled):
    limit = max(request, int(request * ratio))
    policy = make_policy(cpuLimit=mode, headroomPercent=headroom,
                         stepLimit={"maxIncreasePercent": up, "maxDecreasePercent": down})
    history = WorkloadHistory(
        containers={"app": ContainerHistory(below_since=NOW - timedelta(hours=3), peak_m=1)} if settled else {}
    )
    (d,) = decide_one(policy, request=request, limit=limit, upper=upper, history=history).decisions
    if d.proposed_limit_m is not None:
        assert d.proposed_m <= d.proposed_limit_m
    if d.verdict is Verdict.CHANGED:
        assert d.target_m is not None
        lo, hi = sorted((request, d.target_m))
        assert lo <= d.proposed_m <= hi  # between current and target
        # the spec's percentages as factors: up = 1 + inc/100, down = 1 - dec/100 (issue 10)
        assert request * (1 - down / 100) - 1e-6 <= d.proposed_m <= request * (1 + up / 100) + 1e-6
        if mode == "KeepRatio":
            # the ratio is kept: the new limit is the smallest whole millicore with
            # new_limit / new_request >= limit / request
            assert d.proposed_limit_m * request >= limit * d.proposed_m - 1e-6
            assert (d.proposed_limit_m - 1) * request < limit * d.proposed_m + 1e-6
        elif mode == "Keep":
            assert d.proposed_limit_m == limit
        else:
            assert d.proposed_limit_m is None


@given(
    current=st.one_of(st.none(), st.integers(min_value=1, max_value=10**6)),
    limit=st.integers(min_value=1, max_value=10**6),
    new=st.integers(min_value=1, max_value=10**6),
)
def test_limit_for_keep_ratio_never_below_request(current, limit, new):
    if current is not None and current > limit:
        current = limit  # the API server never stores request > limit
    got = limit_for(current, limit, new, CpuLimit.KEEP_RATIO)
    assert got is not None and got >= new


@settings(max_examples=100, deadline=None)
@given(request=st.integers(min_value=10, max_value=20_000), upper=st.floats(min_value=0.0, max_value=30.0))
def test_dry_run_proposes_exactly_where_apply_changes(request, upper):
    apply = decide_one(make_policy(mode="Apply"), request=request, upper=upper).decisions[0]
    dry = decide_one(make_policy(mode="DryRun"), request=request, upper=upper).decisions[0]
    assert (apply.verdict is Verdict.CHANGED) == (dry.verdict is Verdict.PROPOSED)
    assert (apply.proposed_m, apply.proposed_limit_m, apply.why) == (dry.proposed_m, dry.proposed_limit_m, dry.why)
