"""No flapping, and load steps followed: the decision simulated over many passes.

Each pass (60 s apart) the per-pod rates are noisy around a stationary mean; the
"sizing API" maps the p95 rate through a fixed demand curve (linear, the Utilization
Law U = X·S plus an idle base: demand = base + S·rate cores, upper band = 1.1 × demand
+ 10m); the decision is applied to the current request as reconcile would. The
properties (DESIGN.md "One decision"; issue 5): after the first pass that finds the
request on target, a stationary noisy rate yields at most one more change and never a
reversal; a load step up is followed in the very next pass once the cooldown allows;
a load step down waits for ``settle``.
"""

from __future__ import annotations

import random
from dataclasses import dataclass
from datetime import timedelta

from decide_fixtures import NOW, make_policy
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from ratefit.controller.decide import ContainerInput, Sizing, Verdict, Why, decide_workload, rate_percentile
from ratefit.controller.policy import Policy, WorkloadHistory

PASS = timedelta(minutes=1)
ON_TARGET = {Why.INSIDE_DEADBAND, Why.AT_FLOOR, Why.AT_CEILING, Why.AT_LIMIT}


@dataclass
class World:
    """The simulated workload: one container, its request/limit and the policy's status."""

    policy: Policy
    current: int
    limit: int | None
    history: WorkloadHistory
    rng: random.Random
    base: float = 0.05  # idle cores
    service_s: float = 0.004  # CPU seconds per request (Utilization Law: U = X·S)
    pods: int = 10
    amplitude: float = 0.1  # per-pod rate = mean × (1 + amplitude × U(−1, 1))
    t: int = 0  # passes so far

    def step(self, mean: float):
        samples = [mean * (1.0 + self.amplitude * self.rng.uniform(-1.0, 1.0)) for _ in range(self.pods)]
        rate = rate_percentile(samples, self.policy.rate_percentile)
        demand = self.base + self.service_s * rate
        upper = 1.1 * demand + 0.010
        wd = decide_workload(
            self.policy,
            [ContainerInput("app", self.current, self.limit, rate, Sizing(demand, upper))],
            history=self.history,
            now=NOW + self.t * PASS,
        )
        (d,) = wd.decisions
        before = self.current
        if d.verdict is Verdict.CHANGED:
            self.current, self.limit = d.proposed_m, d.proposed_limit_m
        self.history = wd.history
        self.t += 1
        return d, before


def run(world: World, mean: float, passes: int):
    """Run ``passes`` passes; return (first on-target pass or None, the changes after it as ±1)."""
    converged = None
    after: list[int] = []
    for i in range(passes):
        d, before = world.step(mean)
        if d.verdict is Verdict.CHANGED:
            assert d.proposed_m != before
            if converged is not None:
                after.append(1 if d.proposed_m > before else -1)
        elif converged is None and d.why in ON_TARGET:
            converged = i
    return converged, after


worlds = st.builds(
    lambda seed, pods, amplitude, start, limit_ratio: (seed, pods, amplitude, start, limit_ratio),
    seed=st.integers(min_value=0, max_value=2**32 - 1),
    pods=st.integers(min_value=3, max_value=40),
    amplitude=st.floats(min_value=0.0, max_value=0.25),
    start=st.integers(min_value=20, max_value=8000),
    limit_ratio=st.sampled_from([None, 1.0, 1.5, 2.0]),
)


def make_world(params, **spec) -> World:
    seed, pods, amplitude, start, limit_ratio = params
    limit = None if limit_ratio is None else int(start * limit_ratio)
    return World(
        policy=make_policy(**spec), current=start, limit=limit, history=WorkloadHistory(),
        rng=random.Random(seed), pods=pods, amplitude=amplitude,
    )


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(params=worlds, mean=st.floats(min_value=1.0, max_value=500.0))
def test_stationary_noise_converges_and_does_not_flap(params, mean):
    world = make_world(params)
    converged, after = run(world, mean, 500)
    assert converged is not None, "never reached the target in 500 passes"
    assert len(after) <= 1, f"{len(after)} changes after convergence at pass {converged}: {after}"
    if world.limit is not None:
        assert world.current <= world.limit


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(params=worlds, mean=st.floats(min_value=20.0, max_value=200.0), factor=st.floats(min_value=2.0, max_value=4.0))
def test_load_step_up_is_followed_in_the_next_pass(params, mean, factor):
    # From 20 req/s per pod on, the rate part of demand (0.004 s × 20/s = 80m) outweighs the
    # idle base (50m), so doubling the rate moves the target well beyond the 10 % deadband.
    world = make_world(params, container={"ceiling": "64"})
    converged, _ = run(world, mean, 400)
    assert converged is not None
    run(world, mean, 31)  # at least one cooldown (30m) of the same load: nothing pending
    before = world.current
    d, _ = world.step(mean * factor)
    assert d.verdict is Verdict.CHANGED and d.why in {Why.NEW_TARGET, Why.STEP_LIMITED}, d.message
    assert world.current > before


def test_load_step_down_waits_for_settle():
    world = make_world((1, 10, 0.05, 500, 2.0))
    converged, _ = run(world, 100.0, 300)
    assert converged is not None
    high = world.current
    for i in range(200):
        d, _ = world.step(20.0)
        if i < 119:  # settle 2h = 120 passes of 1 min
            assert world.current == high and d.why in {Why.SETTLING, Why.INSIDE_DEADBAND}, (i, d.why)
    assert world.current < high  # and then it does come down
    # a decrease goes to the highest target seen while settling: never below this pass's target
    assert world.current >= d.target_m


def test_noise_larger_than_the_deadband_only_ratchets_up():
    # Beyond the property's domain (2 pods, ±50 %): the request may climb into the noise's
    # upper tail, but it never comes back down and up again (no oscillation).
    for seed in range(10):
        world = make_world((seed, 2, 0.5, 200, 2.0))
        converged, after = run(world, 150.0, 500)
        assert converged is not None
        assert all(step == 1 for step in after), after
