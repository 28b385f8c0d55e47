"""Cross-validation, the choice rule and the split-conformal upper band, checked
against scikit-learn and the conformal-prediction literature."""

from __future__ import annotations

import math

import numpy as np
import pytest
from sklearn.model_selection import KFold, cross_val_score
from threadpoolctl import threadpool_limits

from ratefit.models.candidates import get_candidates
from ratefit.models.errors import InputError
from ratefit.models.samples import Samples
from ratefit.models.select import CandidateScore, choose, conformal_band, cross_validate, select
from ratefit.models.train import train_key_detailed


def _convex(n: int, seed: int = 0, noise: float = 0.03) -> tuple[np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    r = rng.uniform(0, 100, n)
    return r, 0.1 + 0.0003 * r**2 + rng.normal(0, noise, n)


@pytest.mark.parametrize("name", ["linear", "polynomial", "isotonic", "gboost", "forest", "fixed"])
def test_cv_rmse_equals_sklearn_cross_val_score(name: str) -> None:
    # Reference: scikit-learn's own cross_val_score with scoring
    # "neg_root_mean_squared_error" on the same shuffled KFold (scikit-learn docs, 3.1 / 3.4).
    r, y = _convex(800, seed=3)
    (cand,) = get_candidates([name])
    (ours,) = cross_validate(r, y, candidates=[cand], folds=5, seed=7)
    with threadpool_limits(limits=1):  # as ratefit fits (see models/select.py, "Threads")
        ref = -cross_val_score(
            cand.build(7), r.reshape(-1, 1), y, cv=KFold(5, shuffle=True, random_state=7),
            scoring="neg_root_mean_squared_error",
        )
    assert ours.fold_rmse == pytest.approx(tuple(ref), rel=1e-9)
    assert ours.rmse == pytest.approx(float(np.mean(ref)), rel=1e-9)


def test_oof_predictions_cover_every_sample_and_mae_p95() -> None:
    r, y = _convex(500)
    (s,) = cross_validate(r, y, candidates=get_candidates(["linear"]), folds=5, seed=0)
    assert np.all(np.isfinite(s.oof))
    err = np.abs(y - s.oof)
    assert s.p95 == pytest.approx(np.quantile(err, 0.95))
    assert s.mae == pytest.approx(np.mean(err), rel=0.02)  # folds of equal size → mean of fold MAEs ≈ pooled


def _score(name: str, rank: int, rmse: float, eligible: bool = True, secs: float = 0.1) -> CandidateScore:
    return CandidateScore(name=name, rank=rank, eligible=eligible, rmse=rmse, mae=rmse, p95=rmse,
                          fit_seconds=secs, fold_rmse=(rmse,), oof=np.zeros(1))


def test_ties_within_two_percent_go_to_simpler() -> None:
    scores = [_score("fixed", 0, 0.5, eligible=False), _score("linear", 1, 0.1018),
              _score("polynomial", 2, 0.1000), _score("mlp", 7, 0.0999)]
    assert choose(scores).name == "linear"  # 0.1018 ≤ 0.0999 × 1.02 = 0.10190
    scores[1] = _score("linear", 1, 0.1025)
    assert choose(scores).name == "polynomial"
    # the baseline is never chosen, even when it is best
    assert choose([_score("fixed", 0, 0.01, eligible=False), _score("linear", 1, 0.2)]).name == "linear"


def test_conformal_quantile_definition() -> None:
    # Lei et al. 2018 (Distribution-free predictive inference), split conformal: the
    # ceil((n+1)(1-alpha))-th smallest residual. n=19, 1-alpha=0.9 → k=18.
    res = np.arange(1.0, 20.0)
    np.random.default_rng(0).shuffle(res)
    assert conformal_band(res, 0.9) == 18.0
    assert conformal_band(res, 0.95) == 19.0  # k = 19
    assert conformal_band(np.arange(1.0, 10.0), 0.95) == 9.0  # k = 10 > n: the largest
    assert conformal_band(-np.arange(1.0, 20.0), 0.9) == 0.0  # floored at 0
    with pytest.raises(InputError, match="coverage"):
        conformal_band(res, 1.0)


@pytest.mark.parametrize("coverage", [0.9, 0.95])
def test_conformal_coverage_on_fresh_data(coverage: float) -> None:
    # Split-conformal guarantee (Vovk et al. 2005; Lei et al. 2018): P(y <= upper) >= coverage
    # on new samples from the same distribution; checked within ±3 points on 20,000 fresh samples.
    rng = np.random.default_rng(11)
    truth = lambda r: 0.2 + 0.01 * r + 0.00005 * r**2  # noqa: E731
    r = rng.uniform(5, 120, 3000)
    y = truth(r) + rng.normal(0, 0.05, r.size)
    res = train_key_detailed(Samples(rate=r, cpu=y), key="t/cov/app", coverage=coverage, seed=1)
    curve = res.artifact.demand_curve()
    rt = rng.uniform(5, 120, 20000)
    yt = truth(rt) + rng.normal(0, 0.05, rt.size)
    got = float(np.mean(yt <= curve.lookup(rt).upper))
    assert abs(got - coverage) <= 0.03, (got, coverage)


def test_fixed_has_highest_error_and_chosen_beats_linear_on_convex() -> None:
    # fixed allocation is the worst on nonlinear data (common practice, no source)
    r, y = _convex(2000, seed=5)
    sel = select(r, y, folds=5, seed=0)
    by = {s.name: s.rmse for s in sel.scores}
    assert max(by, key=by.get) == "fixed"
    assert set(by) == {"fixed", "linear", "polynomial", "isotonic", "gboost", "svr", "forest", "mlp"}
    # a wide margin: at most half the linear model's error on a clearly convex truth
    assert sel.chosen.rmse < 0.5 * by["linear"]
    assert sel.chosen.name != "linear"


def test_tuned_is_nested_and_recorded() -> None:
    r, y = _convex(400, seed=2)
    sel = select(r, y, candidates=get_candidates(["linear", "polynomial"]), folds=3, seed=0, tune=True)
    assert sel.chosen.name == "polynomial"
    assert sel.params["poly__degree"] in (2, 3) and "ridge__alpha" in sel.params


@pytest.mark.parametrize("name", ["polynomial"])
def test_tuned_cv_equals_sklearn_nested_cv(name: str) -> None:
    # Reference: scikit-learn's nested cross-validation recipe (docs example "Nested versus
    # non-nested cross-validation"): cross_val_score over a GridSearchCV, so the parameter
    # search only ever sees the outer training part.
    from sklearn.model_selection import GridSearchCV

    r, y = _convex(300, seed=4)
    (cand,) = get_candidates([name])
    (ours,) = cross_validate(r, y, candidates=[cand], folds=4, seed=3, tune=True)
    inner = GridSearchCV(cand.build(3), {k: list(v) for k, v in cand.grid.items()},
                         cv=KFold(3, shuffle=True, random_state=3), scoring="neg_root_mean_squared_error")
    with threadpool_limits(limits=1):
        ref = -cross_val_score(inner, r.reshape(-1, 1), y, cv=KFold(4, shuffle=True, random_state=3),
                               scoring="neg_root_mean_squared_error")
    assert ours.fold_rmse == pytest.approx(tuple(ref), rel=1e-9)


def test_progress_per_candidate_and_fold() -> None:
    r, y = _convex(200)
    lines: list[str] = []
    select(r, y, candidates=get_candidates(["linear", "isotonic"]), folds=4, progress=lines.append)
    assert sum("fold" in m for m in lines) == 8
    assert any(m.startswith("chose ") for m in lines)


def test_folds_validation() -> None:
    r, y = _convex(100)
    with pytest.raises(InputError, match="folds"):
        select(r, y, folds=1)
    assert math.isfinite(select(r, y, candidates=get_candidates(["linear"]), folds=2).band)
