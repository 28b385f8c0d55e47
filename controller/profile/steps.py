"""The step runner: constant open-loop rates in rising steps, measured, judged, stopped at the knee.

One step at target rate λ runs the load generator for ``step_duration`` seconds.
The first ``warmup`` seconds are discarded (connections open, caches fill, a
Prometheus rate() window forgets the previous step); the rest, the *measured
window*, is cut into sample windows of ``sample_interval`` seconds at whose
boundaries the CPU probe is read. Per step:

- ``achieved_rate`` — successful responses (2xx/3xx) finished inside the measured
  window, per second: the throughput X of the Utilization Law;
- ``sent_rate`` — requests actually written inside the window, per second;
- ``cpu`` — cores used over the measured window (the U of U = X·S);
- ``p50_ms``/``p95_ms``/``p99_ms`` — latency of the successful requests *scheduled*
  in the window, from their scheduled send time (numpy's linear-interpolation
  percentile); ``error_share`` — their share of errors (non-2xx/3xx, timeouts,
  connection failures).

A step passes when the client kept its schedule (``dispatch_rate``: requests it got
round to in the window, at least target × (1 − rate_tolerance); if not, the step
measured the load generator, not the service, and stepping stops without a
capacity), p99 ≤ the SLO (if given), ``error_share`` ≤ ``max_errors`` and
``achieved_rate ≥ target × (1 − rate_tolerance)``. Steps run in ascending order
and stop after the first that fails: the **capacity** (per-pod capacity, req/s) is
the target rate of the highest step that passed before it, None when no step
failed (the knee lies above the highest rate tried) or the first step failed.
"""

from __future__ import annotations

import asyncio
import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field

import numpy as np

from ratefit.controller.profile.cpu_probe import CpuProbe, CpuReading
from ratefit.controller.profile.fit import LinearFit, linear_fit
from ratefit.controller.profile.loadgen import LoadGenerator, Outcome
from ratefit.models.errors import InputError

__all__ = [
    "Criteria",
    "StepPlan",
    "Sample",
    "StepResult",
    "Profile",
    "judge",
    "find_capacity",
    "run_profile",
    "plan_rates",
    "summarize_step",
]


@dataclass(frozen=True, slots=True)
class Criteria:
    """What a step must meet to count as within capacity."""

    slo_p99_ms: float | None = None
    max_errors: float = 0.01
    rate_tolerance: float = 0.05

    def __post_init__(self) -> None:
        if self.slo_p99_ms is not None and not self.slo_p99_ms > 0:
            raise InputError(f"--slo-p99: {self.slo_p99_ms!r} must be a positive number of milliseconds")
        if not 0 <= self.max_errors < 1:
            raise InputError(f"--max-errors: {self.max_errors!r} must be a share from 0 up to (not including) 1")
        if not 0 <= self.rate_tolerance < 1:
            raise InputError(f"--rate-tolerance: {self.rate_tolerance!r} must be a share from 0 up to 1")


@dataclass(frozen=True, slots=True)
class StepPlan:
    step_duration: float
    warmup: float
    sample_interval: float | None = None  # None: a tenth of the measured window

    def __post_init__(self) -> None:
        if not self.step_duration > 0:
            raise InputError("--step-duration must be positive")
        if not 0 <= self.warmup < self.step_duration:
            raise InputError(
                f"--warmup ({self.warmup:g}s) must be shorter than --step-duration ({self.step_duration:g}s)"
            )
        if self.sample_interval is not None and not 0 < self.sample_interval <= self.measured:
            raise InputError(
                f"--sample-interval ({self.sample_interval:g}s) must be positive and fit in the measured "
                f"window (step duration minus warm-up: {self.measured:g}s)"
            )

    @property
    def measured(self) -> float:
        return self.step_duration - self.warmup

    @property
    def interval(self) -> float:
        if self.sample_interval is not None:
            return self.sample_interval
        return self.measured / 10.0


@dataclass(frozen=True, slots=True)
class Sample:
    """One sample window: achieved rate (req/s), cores, throttled share (NaN unknown)."""

    wall: float  # unix seconds at the window's end
    rate: float
    cpu: float
    throttled: float = math.nan


@dataclass(frozen=True, slots=True)
class StepResult:
    target_rate: float
    achieved_rate: float
    sent_rate: float
    cpu: float
    p50_ms: float
    p95_ms: float
    p99_ms: float
    error_share: float
    requests: int
    errors: int
    samples: tuple[Sample, ...] = ()
    failed: tuple[str, ...] = ()  # why the step is beyond capacity; empty = passed
    dispatch_rate: float = math.nan  # requests the client got round to in the window, per second

    @property
    def client_limited(self) -> bool:
        """The load generator itself fell behind (its event loop was starved of CPU):
        the step says nothing about the service."""
        return bool(self.failed) and self.failed[0].startswith("load generator")

    @property
    def ok(self) -> bool:
        return not self.failed


@dataclass(frozen=True)
class Profile:
    steps: tuple[StepResult, ...]
    capacity: float | None
    fit: LinearFit | None
    stopped: str  # why stepping stopped
    criteria: Criteria = field(default_factory=Criteria)


def plan_rates(*, rates: Sequence[float] | None = None, max_rate: float | None = None, steps: int | None = None) -> list[float]:
    """The ascending target rates from ``--rates`` or ``--max-rate`` with ``--steps``."""
    if rates is not None and max_rate is not None:
        raise InputError("give either --rates R1,R2,… or --max-rate R with --steps N, not both")
    if rates is not None:
        out = sorted(set(float(r) for r in rates))
        if not out or any(not (math.isfinite(r) and r > 0) for r in out):
            raise InputError("--rates: every rate must be a positive number of req/s, e.g. 5,10,20")
        return out
    if max_rate is None:
        raise InputError("give --rates R1,R2,… or --max-rate R (with --steps N)")
    n = 5 if steps is None else int(steps)
    if not (math.isfinite(max_rate) and max_rate > 0):
        raise InputError(f"--max-rate: {max_rate!r} must be a positive number of req/s")
    if n < 1 or n > 1000:
        raise InputError(f"--steps: {n} must be between 1 and 1000")
    return [max_rate * i / n for i in range(1, n + 1)]


def judge(step: StepResult, criteria: Criteria) -> tuple[str, ...]:
    """Why ``step`` lies beyond capacity (empty when it passes)."""
    why = []
    if math.isfinite(step.dispatch_rate) and step.dispatch_rate < step.target_rate * (1 - criteria.rate_tolerance):
        why.append(
            f"load generator fell behind: it got round to {step.dispatch_rate:.4g} of {step.target_rate:g} req/s "
            "(give the profiler more CPU, or run several)"
        )
    if step.achieved_rate < step.target_rate * (1 - criteria.rate_tolerance):
        why.append(
            f"achieved {step.achieved_rate:.4g} req/s < target {step.target_rate:g} "
            f"- {100 * criteria.rate_tolerance:g}%"
        )
    if step.error_share > criteria.max_errors:
        why.append(f"errors {100 * step.error_share:.3g}% > {100 * criteria.max_errors:g}%")
    if criteria.slo_p99_ms is not None:
        if not math.isfinite(step.p99_ms):
            why.append("no successful request to measure p99")
        elif step.p99_ms > criteria.slo_p99_ms:
            why.append(f"p99 {step.p99_ms:.4g} ms > SLO {criteria.slo_p99_ms:g} ms")
    return tuple(why)


def find_capacity(steps: Sequence[StepResult]) -> float | None:
    """Target rate of the highest passing step below the first failing one (ascending
    order); None when none failed, the first one did, or the first failure was the
    load generator's own (the service's knee was not reached)."""
    best = None
    for s in sorted(steps, key=lambda s: s.target_rate):
        if not s.ok:
            return None if s.client_limited else best
        best = s.target_rate
    return None


def _pct(values: np.ndarray, q: float) -> float:
    return float(np.percentile(values, q)) * 1000.0 if values.size else math.nan


def summarize_step(
    target_rate: float,
    outcomes: Sequence[Outcome],
    readings: Sequence[CpuReading],
    probe: CpuProbe,
    criteria: Criteria,
) -> StepResult:
    """Turn one step's outcomes and CPU readings into a judged :class:`StepResult`."""
    ws, we = readings[0].mono, readings[-1].mono
    span = we - ws
    in_window = [o for o in outcomes if ws <= o.scheduled < we]
    ok_lat = np.array([o.latency for o in in_window if o.ok], dtype=float)
    errors = sum(1 for o in in_window if not o.ok)
    finished_ok = np.sort(np.array([o.finished for o in outcomes if o.ok], dtype=float))
    sent = np.array([o.sent for o in outcomes], dtype=float)
    dispatched = np.array([o.dispatched for o in outcomes], dtype=float)
    cores = probe.cores(readings)
    thr = probe.throttled_shares(readings)
    samples = []
    for k, (a, b) in enumerate(zip(readings, readings[1:])):
        n_ok = int(np.searchsorted(finished_ok, b.mono) - np.searchsorted(finished_ok, a.mono))
        dt = b.mono - a.mono
        samples.append(
            Sample(
                wall=b.wall,
                rate=n_ok / dt if dt > 0 else math.nan,
                cpu=cores[k],
                throttled=thr[k] if thr is not None else math.nan,
            )
        )
    weights = np.array([b.mono - a.mono for a, b in zip(readings, readings[1:])])
    cvals = np.array(cores, dtype=float)
    good = np.isfinite(cvals)
    cpu = float(np.sum(cvals[good] * weights[good]) / np.sum(weights[good])) if good.any() else math.nan
    achieved = float(np.searchsorted(finished_ok, we) - np.searchsorted(finished_ok, ws)) / span
    step = StepResult(
        target_rate=target_rate,
        achieved_rate=achieved,
        sent_rate=float(np.count_nonzero((sent >= ws) & (sent < we))) / span,
        cpu=cpu,
        p50_ms=_pct(ok_lat, 50),
        p95_ms=_pct(ok_lat, 95),
        p99_ms=_pct(ok_lat, 99),
        error_share=errors / len(in_window) if in_window else 0.0,
        requests=len(in_window),
        errors=errors,
        samples=tuple(samples),
        dispatch_rate=(
            float(np.count_nonzero((dispatched >= ws) & (dispatched < we))) / span
            if np.isfinite(dispatched).any() else math.nan
        ),
    )
    return _with_failed(step, judge(step, criteria))


def _with_failed(step: StepResult, failed: tuple[str, ...]) -> StepResult:
    from dataclasses import replace

    return replace(step, failed=failed)


async def _run_step(
    gen: LoadGenerator, probe: CpuProbe, rate: float, plan: StepPlan, criteria: Criteria
) -> StepResult:
    loop = asyncio.get_running_loop()
    outcomes: list[Outcome] = []
    t0 = loop.time() + 0.02
    load = loop.create_task(gen.run(rate, plan.step_duration, outcomes.append, start=t0))
    n = max(1, int(round(plan.measured / plan.interval)))
    interval = plan.measured / n
    readings: list[CpuReading] = []
    try:
        for k in range(n + 1):
            due = t0 + plan.warmup + k * interval
            await asyncio.sleep(max(0.0, due - loop.time()))
            before = loop.time()
            wall = time.time()
            reading = probe.read(wall=wall, mono=before)
            after = loop.time()
            # a slow read (a /proc scan) is timed at its middle
            readings.append(
                CpuReading(
                    wall=wall + (after - before) / 2,
                    mono=(before + after) / 2,
                    cpu_seconds=reading.cpu_seconds,
                    periods=reading.periods,
                    throttled=reading.throttled,
                )
            )
        await load
    finally:
        if not load.done():
            load.cancel()
    delay = getattr(probe, "delay", 0.0)
    if delay:
        await asyncio.sleep(max(0.0, readings[-1].wall + delay - time.time()))
    return summarize_step(rate, outcomes, readings, probe, criteria)


async def run_profile(
    gen: LoadGenerator,
    probe: CpuProbe,
    rates: Sequence[float],
    plan: StepPlan,
    criteria: Criteria,
    *,
    progress: Callable[[str], None] | None = None,
    stop_at_knee: bool = True,
) -> Profile:
    """Run the steps in ascending order, stop after the first failing one (see the module docstring)."""
    rates = sorted(rates)
    await gen.probe()
    steps: list[StepResult] = []
    stopped = f"all {len(rates)} steps ran; no knee up to {rates[-1]:g} req/s"
    for i, rate in enumerate(rates, start=1):
        step = await _run_step(gen, probe, rate, plan, criteria)
        steps.append(step)
        if progress is not None:
            verdict = "ok" if step.ok else "beyond capacity: " + "; ".join(step.failed)
            progress(
                f"step {i}/{len(rates)}: target {rate:g} req/s, achieved {step.achieved_rate:.4g} req/s, "
                f"cpu {step.cpu:.4g} cores, p50 {step.p50_ms:.3g} ms, p99 {step.p99_ms:.3g} ms, "
                f"errors {100 * step.error_share:.3g}% - {verdict}"
            )
        if step.client_limited:
            stopped = (
                f"stopped after step {i}/{len(rates)} ({rate:g} req/s): the load generator fell behind, "
                "so the service's knee was not measured there"
            )
            break
        if not step.ok and stop_at_knee:
            stopped = f"stopped after step {i}/{len(rates)} ({rate:g} req/s): beyond capacity"
            break
    await gen.aclose()
    capacity = find_capacity(steps)
    below = [s for s in steps if s.ok and (capacity is None or s.target_rate <= capacity)]
    if capacity is None and steps and not steps[0].ok:
        below = []
    fit = linear_fit([s.achieved_rate for s in below], [s.cpu for s in below])
    return Profile(steps=tuple(steps), capacity=capacity, fit=fit, stopped=stopped, criteria=criteria)
