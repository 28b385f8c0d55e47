"""DemandCurve and CurveBank: monotone repair, lookups, millicores."""

from __future__ import annotations

import math

import numpy as np
import pytest
from sklearn.isotonic import IsotonicRegression

from ratefit.models.curve import CurveBank, DemandCurve, monotone, to_millicores
from ratefit.models.errors import ArtifactError, InputError


def test_monotone_repair_equals_sklearn_isotonic() -> None:
    # reference: scikit-learn's IsotonicRegression is the least-squares non-decreasing fit
    rng = np.random.default_rng(0)
    y = np.cumsum(rng.normal(0.01, 0.1, 129)) + 1.0
    ref = IsotonicRegression().fit_transform(np.arange(y.size), y)
    assert np.allclose(monotone(y), np.maximum(ref, 0.0))
    assert np.all(np.diff(monotone(y)) >= 0)
    assert monotone(np.array([-1.0, -2.0, 3.0])).min() >= 0.0


def test_tabulate_makes_monotone_and_refuses_nan() -> None:
    c = DemandCurve.tabulate(lambda g: 1 + np.sin(g), rate_lo=0, rate_hi=10, band=0.1)
    assert np.all(np.diff(c.cpu) >= 0)
    with pytest.raises(InputError, match="non-finite"):
        DemandCurve.tabulate(lambda g: g * np.nan, rate_lo=0, rate_hi=10, band=0.1)


def test_constructor_refuses_bad_curves() -> None:
    with pytest.raises(ArtifactError, match="non-decreasing"):
        DemandCurve(rate_lo=0, rate_hi=1, cpu=[1.0, 0.5], band=0)
    with pytest.raises(ArtifactError, match="rate range"):
        DemandCurve(rate_lo=2, rate_hi=1, cpu=[1.0, 2.0], band=0)
    with pytest.raises(ArtifactError, match="band"):
        DemandCurve(rate_lo=0, rate_hi=1, cpu=[1.0, 2.0], band=-1)


def test_lookup_one_equals_vectorised_lookup() -> None:
    c = DemandCurve.tabulate(lambda g: 0.1 + 0.001 * g**1.5, rate_lo=5, rate_hi=80, band=0.05)
    rates = [0.0, 4.9, 5.0, 17.3, 79.99, 80.0, 120.0]
    vec = c.lookup(rates)
    for i, r in enumerate(rates):
        d, u, e = c.lookup_one(r)
        assert d == pytest.approx(vec.demand[i]) and u == pytest.approx(vec.upper[i])
        assert e == bool(vec.extrapolated[i])
    with pytest.raises(InputError, match="rate"):
        c.lookup_one(-1.0)
    with pytest.raises(InputError, match="rate"):
        c.lookup([1.0, math.nan])


def test_curve_bank_equals_single_lookups() -> None:
    curves = {
        f"ns/w{i}/c": DemandCurve.tabulate(lambda g, i=i: 0.01 * i + 0.002 * g * (1 + i % 3), rate_lo=i, rate_hi=50 + i,
                                           band=0.01 * i)
        for i in range(20)
    }
    bank = CurveBank(curves)
    keys = [f"ns/w{i % 20}/c" for i in range(200)]
    rates = np.linspace(0, 120, 200)
    got = bank.lookup(bank.rows(keys), rates)
    for j, (k, r) in enumerate(zip(keys, rates)):
        d, u, e = curves[k].lookup_one(float(r))
        assert got.demand[j] == pytest.approx(d) and got.upper[j] == pytest.approx(u) and got.extrapolated[j] == e
    assert bank.rows(["nope/x/y"]).tolist() == [-1]


def test_millicores_round_up() -> None:
    # Kubernetes CPU precision is 1m (Kubernetes docs, "Resource units in Kubernetes")
    assert to_millicores(0.1) == 100  # no float noise: 0.1 * 1000 is 100.00000000000001
    assert to_millicores(0.1001) == 101
    assert to_millicores(0.0) == 0
