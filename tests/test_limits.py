"""The brakes: step limit, cooldown, token bucket, rollout slots, backoff.

The token bucket is checked against its textbook definition (rate r, bucket size b:
at most b + r·t admissions in any window of length t — the standard (r, b) token-bucket
bound, e.g. RFC 2697/2698's token counts, Tanenbaum "Computer Networks"); full jitter
is the "Exponential Backoff And Jitter" scheme: delay uniform in [0, min(cap, base·2^n)]
(common practice, no standard).
"""

from __future__ import annotations

import random
from datetime import datetime, timedelta, timezone

import pytest
from hypothesis import given
from hypothesis import strategies as st

from ratefit.controller.limits import (
    Budget,
    BudgetView,
    Cooldown,
    ExponentialBackoff,
    RolloutSlots,
    TokenBucket,
    round_up,
    step_limit,
)

T0 = datetime(2026, 12, 1, 12, 0, tzinfo=timezone.utc)


def test_round_up():
    assert round_up(229.99999999999997, 5) == 230  # 0.2 × 1000 × 1.15 in binary floats
    assert round_up(231, 5) == 235
    assert round_up(230, 5) == 230
    assert round_up(0.1, 1) == 1


def test_step_limit_examples():
    assert step_limit(500, 2000, up=2.0, down=0.5) == (1000, True)
    assert step_limit(500, 900, up=2.0, down=0.5) == (900, False)
    assert step_limit(1000, 100, up=2.0, down=0.5) == (500, True)
    assert step_limit(1000, 600, up=2.0, down=0.5) == (600, False)
    assert step_limit(333, 2000, up=1.5, down=0.5) == (495, True)  # 499.5 → down to 5m: 495
    assert step_limit(333, 10, up=2.0, down=0.75) == (250, True)  # 249.75 → up to 5m: 250
    assert step_limit(3, 100, up=1.5, down=0.5) == (4, True)  # 4.5: no 5m multiple above 3 → 4m


@given(
    current=st.integers(min_value=1, max_value=100_000),
    target=st.integers(min_value=1, max_value=200_000),
    up=st.floats(min_value=1.0, max_value=10.0),
    down=st.floats(min_value=0.01, max_value=1.0),
)
def test_step_limit_bounds(current, target, up, down):
    new, limited = step_limit(current, target, up=up, down=down)
    assert current * down - 1e-6 <= new <= current * up + 1e-6 or new == current
    assert min(current, target) <= new <= max(current, target)  # never overshoots the target
    assert limited == (new != target)


def test_cooldown():
    cd = Cooldown(1800)
    assert cd.ready(None, T0)
    assert cd.remaining(T0, T0 + timedelta(minutes=10)) == 1200
    assert not cd.ready(T0, T0 + timedelta(minutes=29, seconds=59))
    assert cd.ready(T0, T0 + timedelta(minutes=30))
    assert Cooldown(0).ready(T0, T0)


def test_token_bucket_examples():
    b = TokenBucket.per_minute(2, now=0.0)  # 2 per minute, burst 2
    assert b.try_take(0.0) and b.try_take(0.0)
    assert not b.try_take(0.0)
    assert b.delay(0.0) == pytest.approx(30.0)
    assert not b.try_take(29.9)
    assert b.try_take(30.0)
    assert b.available(1000.0) == 2.0  # never more than the burst


@given(
    rate_per_min=st.floats(min_value=0.5, max_value=120),
    burst=st.integers(min_value=1, max_value=20),
    gaps=st.lists(st.floats(min_value=0.0, max_value=30.0), min_size=1, max_size=200),
)
def test_token_bucket_admits_at_most_burst_plus_rate_times_t(rate_per_min, burst, gaps):
    b = TokenBucket(rate=rate_per_min / 60.0, burst=burst, now=0.0)
    now, admitted = 0.0, []
    for g in gaps:
        now += g
        if b.try_take(now):
            admitted.append(now)
    # (r, b) token-bucket bound over every window [admitted[i], admitted[j]]
    for i in range(len(admitted)):
        for j in range(i, len(admitted)):
            assert j - i + 1 <= burst + (admitted[j] - admitted[i]) * rate_per_min / 60.0 + 1e-6


def test_rollout_slots():
    s = RolloutSlots(2)
    assert s.acquire("a") and s.acquire("b")
    assert s.acquire("a")  # already holds one
    assert not s.acquire("c") and s.free == 0
    s.release("a")
    assert s.acquire("c") and s.holders() == {"b", "c"}
    s.sync(["x"])  # level-based: what the cluster shows rolling
    assert s.holders() == {"x"} and s.free == 1


def test_budget_spend_and_view():
    budget = Budget(bucket=TokenBucket(rate=1 / 60, burst=2, now=0.0), slots=RolloutSlots(1))
    assert budget.view(0.0) == BudgetView(changes_left=2, rollouts_free=1)
    assert budget.spend("ns/Deployment/a", 0.0)
    v = budget.view(0.0)
    assert v == BudgetView(changes_left=1, rollouts_free=0) and v.refusal() == "every concurrent-rollout slot is taken"
    assert not budget.spend("ns/Deployment/b", 0.0)  # no slot: and no token was taken
    assert budget.view(0.0).changes_left == 1
    budget.slots.release("ns/Deployment/a")
    assert budget.spend("ns/Deployment/b", 0.0)
    budget.slots.release("ns/Deployment/b")
    assert budget.view(0.0).refusal() == "the cluster-wide budget of changes per minute is spent"
    assert not budget.spend("ns/Deployment/c", 0.0)
    assert budget.spend("ns/Deployment/c", 60.0)
    assert Budget().view(0.0).refusal() is None  # unlimited


def test_backoff_full_jitter_and_cap():
    rng = random.Random(7)
    bo = ExponentialBackoff(base=0.5, cap=8.0, rng=rng)
    ceilings = []
    for _ in range(8):
        d = bo.failed("k")
        ceilings.append(bo.ceiling("k"))
        assert 0.0 <= d <= bo.ceiling("k")
    assert ceilings == [0.5, 1.0, 2.0, 4.0, 8.0, 8.0, 8.0, 8.0]
    assert bo.failures("k") == 8
    bo.forget("k")
    assert bo.failures("k") == 0 and bo.ceiling("k") == 0.0
    # full jitter spreads over the whole interval: the mean of many draws is about cap/2
    bo2 = ExponentialBackoff(base=1.0, cap=4.0, rng=random.Random(1))
    for _ in range(5):
        bo2.failed("x")
    draws = [bo2.failed("x") for _ in range(4000)]
    assert 1.8 < sum(draws) / len(draws) < 2.2
    assert min(draws) < 0.1 and max(draws) > 3.9
    for _ in range(2000):  # huge failure counts do not overflow
        bo2.failed("x")
    assert bo2.ceiling("x") == 4.0

