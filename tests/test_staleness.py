"""The staleness test (controller/staleness.py): the one-sided binomial p-value against a
reference library, the exceedance count, and no false alarms on a stationary scenario.

Sources: the p-values are checked against ``scipy.stats.binomtest(k, n, p,
alternative="greater").pvalue`` (SciPy reference documentation, scipy.stats.binomtest)
and ``scipy.stats.binom.sf(k - 1, n, p)``. The test's level is alpha = 0.001
(``staleness.ALPHA``). The stationary scenario is INVENTED (seeded simulation).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from ratefit.controller.staleness import (
    ALPHA,
    MIN_SAMPLES,
    band_rates,
    binomial_sf,
    exceedance,
    judge,
    usage_target_m,
)


@pytest.mark.parametrize(("k", "n", "p"), [
    (0, 10, 0.05), (1, 10, 0.05), (3, 72, 0.05), (10, 72, 0.05), (20, 72, 0.05), (72, 72, 0.05),
    (50, 1000, 0.05), (80, 1000, 0.05), (700, 5000, 0.1), (5, 5, 0.5), (17, 40, 0.3), (1, 1, 0.999),
    (400, 20000, 0.01), (3, 3000, 0.0005),
])
def test_binomial_sf_equals_scipy_binomtest(k: int, n: int, p: float) -> None:
    # source: SciPy reference, scipy.stats.binomtest (exact test), alternative="greater"
    ref = stats.binomtest(k, n, p, alternative="greater").pvalue
    got = binomial_sf(k, n, p)
    assert got == pytest.approx(ref, rel=1e-9, abs=1e-300)
    assert got == pytest.approx(stats.binom.sf(k - 1, n, p), rel=1e-9, abs=1e-300)


def test_binomial_sf_random_grid_against_scipy() -> None:
    rng = np.random.default_rng(7)
    for _ in range(200):
        n = int(rng.integers(1, 3000))
        k = int(rng.integers(0, n + 1))
        p = float(rng.uniform(0.001, 0.5))
        assert binomial_sf(k, n, p) == pytest.approx(stats.binomtest(k, n, p, alternative="greater").pvalue,
                                                     rel=1e-8, abs=1e-300)


def test_binomial_sf_edges_and_bad_input() -> None:
    assert binomial_sf(0, 0, 0.05) == 1.0
    assert binomial_sf(3, 2, 0.05) == 0.0
    assert binomial_sf(1, 10, 0.0) == 0.0
    with pytest.raises(ValueError):
        binomial_sf(1, 10, 1.5)
    with pytest.raises(ValueError):
        binomial_sf(-1, 10, 0.1)


def test_exceedance_interpolates_the_band_and_drops_bad_samples() -> None:
    grid, bound = [0.0, 10.0], [0.1, 1.1]  # band 0.1 + 0.1 × rate
    rates = [0.0, 5.0, 5.0, 10.0, float("nan"), 2.0]
    cpu = [0.05, 0.61, 0.59, 2.0, 9.0, float("inf")]
    k, n = exceedance(rates, cpu, grid, bound)
    # band at 5 is 0.6: 0.61 above, 0.59 not; 2.0 > 1.1 at 10; NaN rate and inf cpu dropped
    assert (k, n) == (2, 4)


def test_band_rates_bounded_and_spanning() -> None:
    r = np.linspace(3.0, 9.0, 5000)
    g = band_rates(r)
    assert len(g) == 60 and g[0] == 3.0 and g[-1] == 9.0
    assert list(band_rates([2.0, 2.0])) == [2.0]
    assert band_rates([]).size == 0


def test_judge_marks_a_forty_percent_shift_and_not_the_model_itself() -> None:
    rng = np.random.default_rng(1)
    rates = rng.uniform(1.0, 10.0, 300)
    noise = rng.normal(0.0, 0.02, 300)
    truth = 0.05 + 0.04 * rates
    band = 1.645 * 0.02  # the 95 % one-sided normal quantile × sigma (handbook value)
    grid = np.linspace(0.0, 12.0, 50)
    bound = 0.05 + 0.04 * grid + band
    fresh = judge(rates, truth + noise, grid, bound)
    assert not fresh.stale and fresh.samples == 300
    after = judge(rates, 1.4 * truth + noise, grid, bound)  # a release: +40 % CPU per request
    assert after.stale and after.significant and after.p_value < ALPHA
    assert after.ratio > 0.5
    assert "exceedance ratio" in after.message() and f"{after.ratio:.3f}" in after.message()
    assert after.usage_p95 == pytest.approx(np.percentile(1.4 * truth + noise, 95))


def test_judge_needs_enough_samples_and_flags_a_changed_image() -> None:
    few = judge([1.0] * (MIN_SAMPLES - 1), [9.0] * (MIN_SAMPLES - 1), [0.0, 2.0], [0.1, 0.1])
    assert few.p_value < ALPHA and not few.stale  # everything above, but too few samples to judge
    img = judge([1.0] * 50, [0.0] * 50, [0.0, 2.0], [0.1, 0.1], image_changed="image changed from a:1 to a:2")
    assert img.stale and not img.significant and "a:2" in img.message()


def test_usage_target() -> None:
    assert usage_target_m(0.5, headroom=0.15) == 575
    with pytest.raises(ValueError):
        usage_target_m(float("nan"), headroom=0.1)


def test_no_false_alarm_on_a_stationary_scenario_over_a_simulated_week() -> None:
    """INVENTED stationary scenario: 3 pods, rate with a daily cycle, CPU = a + b·rate +
    Gaussian noise. The model is fitted on one day (least squares) with a split-conformal
    band at 0.95 (quantile ceil((n+1)·0.95)/n of held-out residuals; Vovk et al. / Lei et al.
    split conformal). Then a week of passes every 10 minutes, each judging the last 6 h
    sampled every 5 minutes (disjoint rate windows). The stale mark must fire in fewer than
    1 % of container-passes; with alpha = 0.001 we expect about 0.1 %."""
    rng = np.random.default_rng(2026)
    step = 300.0
    pods = 3
    week = int(8 * 86400 / step)  # one training day + a week
    t = np.arange(week) * step
    base = 6.0 + 4.0 * np.sin(2 * np.pi * t / 86400.0)
    rates = np.clip(base[None, :] * rng.uniform(0.9, 1.1, (pods, 1)) + rng.normal(0, 0.5, (pods, week)), 0.1, None)
    cpu = 0.08 + 0.035 * rates + rng.normal(0.0, 0.025, (pods, week))

    day = int(86400 / step)
    x, y = rates[:, :day].ravel(), cpu[:, :day].ravel()
    half = x.size // 2
    b, a = np.polyfit(x[:half], y[:half], 1)
    resid = np.sort(y[half:] - (a + b * x[half:]))
    m = resid.size
    band = resid[min(m - 1, math.ceil((m + 1) * 0.95) - 1)]
    grid = np.linspace(0.0, 20.0, 60)
    bound = a + b * grid + band

    window = int(6 * 3600 / step)
    passes = alarms = 0
    for end in range(day + window, week, 2):  # a pass every 10 minutes
        s = judge(rates[:, end - window:end].ravel(), cpu[:, end - window:end].ravel(), grid, bound)
        passes += 1
        alarms += s.stale
    assert passes > 900  # a week every 10 minutes, after the first 6 h window
    print(f"stationary week: {alarms} stale marks in {passes} container-passes")
    assert alarms / passes < 0.01, (alarms, passes)


def test_change_point_finds_the_release() -> None:
    """INVENTED: 12 h at 5-minute steps, 3 pods; at hour 6 the CPU per request rises 40 %.
    The likelihood-ratio change point (Page 1954) must land within 30 minutes of the release."""
    rng = np.random.default_rng(3)
    step, hours, pods = 300.0, 12, 3
    t = np.repeat(np.arange(int(hours * 3600 / step)) * step, pods)
    rates = rng.uniform(5.0, 15.0, t.size)
    release = 6 * 3600.0
    factor = np.where(t >= release, 1.4, 1.0)
    cpu = factor * (0.05 + 0.02 * rates) + rng.normal(0.0, 0.01, t.size)
    grid = np.linspace(0.0, 20.0, 60)
    bound = 0.05 + 0.02 * grid + 1.645 * 0.01
    s = judge(rates, cpu, grid, bound, timestamps=t)
    assert s.stale and s.change_at is not None
    assert abs(s.change_at - release) <= 1800.0, s.change_at
