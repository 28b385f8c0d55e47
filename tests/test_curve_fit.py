"""Learned curves against handbook laws: the Utilization Law, monotone demand,
flagged extrapolation, and tabulation faithful to the chosen estimator."""

from __future__ import annotations

import numpy as np
import pytest

from ratefit.models.candidates import get_candidates
from ratefit.models.samples import Samples
from ratefit.models.select import fit_final
from ratefit.models.train import train_key, train_key_detailed


def test_utilization_law_recovered_by_linear_fit() -> None:
    # Utilization Law (operational analysis; Denning & Buzen 1978, Jain 1991): U = X·S,
    # with X the throughput (req/s) and S the service demand (CPU-seconds per request);
    # plus a constant base (idle work). Here S = 4 ms of CPU per request, base 0.05 cores.
    rng = np.random.default_rng(42)
    S, base = 0.004, 0.05
    X = rng.uniform(5, 250, 5000)
    U = X * S + base + rng.normal(0, 0.01, X.size)
    (lin,) = get_candidates(["linear"])
    est, _ = fit_final(lin, X, U, seed=0, tune=False)
    assert est.coef_[0] == pytest.approx(S, rel=0.02)
    assert est.intercept_ == pytest.approx(base, rel=0.02)
    # the whole pipeline picks a line (ties go to the simpler model) and its curve has slope S
    art = train_key(Samples(rate=X[:2000], cpu=U[:2000]), key="law/util/app")
    assert art.chosen == "linear"
    c = art.demand_curve()
    d1, d2 = c.lookup([50.0, 200.0]).demand
    assert (d2 - d1) / 150.0 == pytest.approx(S, rel=0.02)
    assert c.lookup_one(0.0)[0] == pytest.approx(c.lookup_one(c.rate_lo)[0])


def test_curve_monotone_even_on_noisy_non_monotone_fit() -> None:
    rng = np.random.default_rng(3)
    r = rng.uniform(0, 60, 1500)
    y = 0.2 + 0.01 * r + 0.05 * np.sin(r / 3) + rng.normal(0, 0.02, r.size)  # wiggly truth
    for name in ("polynomial", "mlp", "svr"):
        art = train_key(Samples(rate=r, cpu=y), key="m/wiggle/app", candidates=get_candidates([name]))
        assert np.all(np.diff(art.curve.cpu) >= 0), name


def test_extrapolation_flagged_and_linear_beyond_range() -> None:
    rng = np.random.default_rng(4)
    r = rng.uniform(10, 100, 1000)
    y = 0.1 + 0.003 * r + rng.normal(0, 0.01, r.size)
    res = train_key_detailed(Samples(rate=r, cpu=y), key="x/extra/app")
    c = res.artifact.demand_curve()
    lo, hi = res.artifact.rate_range
    assert (lo, hi) == (float(r.min()), float(r.max()))
    out = c.lookup([lo, (lo + hi) / 2, hi, hi * 2, lo / 2])
    assert out.extrapolated.tolist() == [False, False, False, True, True]
    # beyond the top: continues with the top slope (≈ 0.003 cores per req/s here)
    assert (out.demand[3] - out.demand[2]) / hi == pytest.approx(0.003, rel=0.1)
    assert out.demand[4] == out.demand[0]  # held flat below the range
    assert np.all(out.upper - out.demand == pytest.approx(res.selection.band))


def test_tabulated_curve_follows_the_estimator() -> None:
    rng = np.random.default_rng(5)
    r = rng.uniform(0, 100, 3000)
    y = 0.1 + 0.0002 * r**2 + rng.normal(0, 0.02, r.size)
    res = train_key_detailed(Samples(rate=r, cpu=y), key="t/tab/app",
                             candidates=get_candidates(["fixed", "linear", "polynomial", "gboost"]))
    grid = np.linspace(r.min(), r.max(), 997)
    est = res.selection.estimator.predict(grid.reshape(-1, 1))
    got = res.artifact.demand_curve().lookup(grid).demand
    # 128 segments over a smooth curve: interpolation error far below the noise (0.02)
    assert np.max(np.abs(got - np.maximum.accumulate(est))) < 0.02
