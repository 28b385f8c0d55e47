"""The candidate estimators: contract, monotone constraints, baseline, grids."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.base import clone
from sklearn.dummy import DummyRegressor
from sklearn.model_selection import ParameterGrid
from threadpoolctl import threadpool_limits

from ratefit.models.candidates import CANDIDATES, Subsampled, get_candidates
from ratefit.models.errors import InputError


def _data(n: int = 600, seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    r = rng.uniform(0, 50, n)
    return r.reshape(-1, 1), 0.05 + 0.02 * r + rng.normal(0, 0.05, n)


def test_names_ranks_unique_and_the_design_list() -> None:
    names = [c.name for c in CANDIDATES]
    assert names == ["fixed", "linear", "polynomial", "isotonic", "gboost", "svr", "forest", "mlp"]
    assert len({c.rank for c in CANDIDATES}) == len(CANDIDATES)
    assert [c.name for c in CANDIDATES if not c.eligible] == ["fixed"]
    with pytest.raises(InputError, match="unknown candidate"):
        get_candidates(["linear", "xgb"])


@pytest.fixture(autouse=True)
def _one_thread():
    # as ratefit fits (models/select.py, "Threads"): OpenMP on one thread
    with threadpool_limits(limits=1):
        yield


@pytest.mark.parametrize("cand", CANDIDATES, ids=lambda c: c.name)
def test_fit_predict_clone(cand) -> None:
    X, y = _data()
    est = cand.build(0)
    # scikit-learn's estimator contract: clone copies parameters, fit returns self
    assert clone(est).get_params(deep=False).keys() == est.get_params(deep=False).keys()
    assert est.fit(X, y) is est
    pred = est.predict(np.linspace(0, 50, 20).reshape(-1, 1))
    assert pred.shape == (20,) and np.all(np.isfinite(pred))
    for point in list(ParameterGrid({k: list(v) for k, v in cand.grid.items()}))[:2]:
        clone(est).set_params(**point).fit(X[:200], y[:200])


@pytest.mark.parametrize("name", ["gboost", "isotonic"])
def test_monotone_by_construction(name: str) -> None:
    rng = np.random.default_rng(1)
    r = rng.uniform(0, 10, 800)
    y = np.sin(r) + 0.1 * r  # non-monotone truth
    (cand,) = get_candidates([name])
    pred = cand.build(0).fit(r.reshape(-1, 1), y).predict(np.linspace(0, 10, 300).reshape(-1, 1))
    assert np.all(np.diff(pred) >= -1e-12)


def test_fixed_allocation_is_the_095_quantile() -> None:
    X, y = _data()
    (fixed,) = get_candidates(["fixed"])
    est = fixed.build(0).fit(X, y)
    assert est.predict(X[:3]).tolist() == [np.quantile(y, 0.95)] * 3


def _max_of(est: DummyRegressor) -> float:
    return float(np.ravel(est.constant_)[0])


def test_subsampled_fits_at_most_max_samples() -> None:
    X, y = _data(1000)
    top = DummyRegressor(strategy="quantile", quantile=1.0)
    est = Subsampled(estimator=top, max_samples=50, random_state=0).fit(X, y)
    # the inner fit saw 50 of the 1000 values: its max is one of them, below the global max
    assert _max_of(est.estimator_) in set(y.tolist())
    assert _max_of(est.estimator_) < y.max()
    small = Subsampled(estimator=top, max_samples=5000).fit(X, y)
    assert _max_of(small.estimator_) == y.max()


def test_forest_bootstrap_cap_keeps_parameter(monkeypatch) -> None:
    import ratefit.models.candidates as c

    monkeypatch.setattr(c, "FOREST_MAX_SAMPLES", 100)
    X, y = _data(300)
    est = c._forest(0)
    est.set_params(n_estimators=3).fit(X, y)
    assert est.get_params()["max_samples"] is None
