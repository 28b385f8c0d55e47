"""Choosing a demand model: k-fold cross-validation, the choice rule, the upper band.

Cross-validation. ``KFold(n_splits=folds, shuffle=True, random_state=seed)``
(default 5 folds, seed 0) — the same folds for every candidate. Each candidate is
fitted on the training part of each fold and predicts the held-out part, which
gives one out-of-fold prediction per sample. Reported per candidate (cores):

- ``rmse``: the mean over folds of the fold's root mean squared error — the figure
  scikit-learn's ``cross_val_score(..., scoring="neg_root_mean_squared_error")``
  reports (negated) on the same folds, so the two can be checked against each other;
- ``mae``: the mean over folds of the fold's mean absolute error;
- ``p95``: the 0.95 quantile of all out-of-fold absolute errors;
- ``fit_seconds``: mean wall time of one fold's fit (with the inner search when tuned).

Choice. The lowest RMSE wins, except that any eligible candidate within 2% of the
best RMSE counts as a tie and the tie goes to the lowest simplicity rank (simpler
and faster; see ``models.candidates``). The fixed-allocation baseline is scored but
never chosen.

Tuning (``tune=True``) is nested, so the reported error stays honest: inside each
outer fold a ``GridSearchCV`` (3 inner folds, shuffled, same seed, RMSE) picks
the parameters on the outer training part only (on a random subsample of at most
``TUNE_MAX_SAMPLES`` of it, to bound the cost on large inputs), the candidate is
refitted with them on the whole outer training part and scored on the outer
held-out fold. The outer folds never inform the parameter choice. The final model
is tuned the same way on all samples and refitted on all of them; its parameters
are the chosen row's ``params``; the other rows record, per grid parameter, the
value the outer folds' searches picked most often.

Threads. Every fit runs with OpenMP and BLAS limited to one thread
(``threadpoolctl``): on a shared 2-core machine, gradient boosting's OpenMP threads
spinning against other work made its fits about 7× slower than one thread.

Upper band. One-sided split-conformal quantile (Vovk et al. 2005; Lei et al. 2018)
of the chosen model's *signed* out-of-fold residuals r = cpu − prediction: with n
residuals and coverage c, the band is the k-th smallest residual,
k = ceil((n + 1)·c) (the whole range's maximum if k > n), floored at 0. Then
"cpu ≤ demand + band" holds with probability ≥ c on a new sample from the same
distribution. One-sided because the question the sizing answers is one-sided
("demand will be at most X"); an absolute-residual band would spend half its
miss budget on over-predictions that never starve a pod. The band is one constant
over the whole rate range (it does not widen where the noise does). Strictly, the
finite-sample guarantee is for residuals from a split the model never saw; K-fold
out-of-fold residuals of models refitted on all data are the cross-conformal
variant, whose guarantee is slightly weaker in theory (from memory: Barber et al.
2021, "jackknife+"); ``tests/test_select.py`` checks the empirical coverage on
fresh data at two levels.
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from sklearn.base import clone
from sklearn.model_selection import GridSearchCV, KFold
from threadpoolctl import threadpool_limits

from ratefit.models.candidates import Candidate, get_candidates
from ratefit.models.errors import InputError, NotEnoughData

__all__ = [
    "CandidateScore",
    "Selection",
    "TIE_TOLERANCE",
    "INNER_FOLDS",
    "TUNE_MAX_SAMPLES",
    "make_folds",
    "cross_validate",
    "choose",
    "conformal_band",
    "fit_final",
    "select",
]

TIE_TOLERANCE = 0.02
INNER_FOLDS = 3
TUNE_MAX_SAMPLES = 20000
Progress = Callable[[str], None]
ParamValue = float | int | str | bool | None


@dataclass(frozen=True, eq=False)
class CandidateScore:
    """Cross-validated errors of one candidate (cores) and its out-of-fold predictions."""

    name: str
    rank: int
    eligible: bool
    rmse: float
    mae: float
    p95: float
    fit_seconds: float
    fold_rmse: tuple[float, ...]
    oof: np.ndarray
    params: dict[str, ParamValue] = field(default_factory=dict)


@dataclass(frozen=True, eq=False)
class Selection:
    """The outcome of ``select``: every score, the chosen one, its refitted
    estimator (on all samples), the band and the coverage it was computed for."""

    scores: list[CandidateScore]
    chosen: CandidateScore
    estimator: Any
    band: float
    coverage: float
    params: dict[str, ParamValue]

    def score(self, name: str) -> CandidateScore:
        for s in self.scores:
            if s.name == name:
                return s
        raise KeyError(name)


def make_folds(folds: int, *, seed: int) -> KFold:
    if folds < 2:
        raise InputError(f"folds: {folds} must be at least 2")
    return KFold(n_splits=folds, shuffle=True, random_state=seed)


def _as_X(rate: np.ndarray) -> np.ndarray:
    return np.asarray(rate, dtype=float).reshape(-1, 1)


def _tuned(cand: Candidate, X: np.ndarray, y: np.ndarray, *, seed: int) -> tuple[Any, dict[str, Any]]:
    """Search ``cand.grid`` with inner CV on (a subsample of) X, y; return an unfitted
    estimator set to the best parameters, and those parameters."""
    est = cand.build(seed)
    if not cand.grid:
        return est, {}
    if X.shape[0] > TUNE_MAX_SAMPLES:
        rng = np.random.default_rng(seed)
        pick = np.sort(rng.choice(X.shape[0], TUNE_MAX_SAMPLES, replace=False))
        Xs, ys = X[pick], y[pick]
    else:
        Xs, ys = X, y
    search = GridSearchCV(
        est,
        {k: list(v) for k, v in cand.grid.items()},
        cv=KFold(n_splits=INNER_FOLDS, shuffle=True, random_state=seed),
        scoring="neg_root_mean_squared_error",
        refit=False,
        n_jobs=1,
        error_score="raise",
    )
    search.fit(Xs, ys)
    best = dict(search.best_params_)
    return clone(est).set_params(**best), best


def _one_candidate(
    cand: Candidate,
    X: np.ndarray,
    y: np.ndarray,
    *,
    cv: KFold,
    seed: int,
    tune: bool,
    progress: Progress | None,
) -> CandidateScore:
    oof = np.empty(y.size)
    fold_rmse: list[float] = []
    fold_mae: list[float] = []
    seconds: list[float] = []
    picks: list[dict[str, Any]] = []
    k = cv.get_n_splits()
    for i, (tr, te) in enumerate(cv.split(X), start=1):
        t0 = time.perf_counter()
        if tune and cand.grid:
            est, best = _tuned(cand, X[tr], y[tr], seed=seed)
            picks.append(best)
        else:
            est = cand.build(seed)
        est.fit(X[tr], y[tr])
        seconds.append(time.perf_counter() - t0)
        pred = np.asarray(est.predict(X[te]), dtype=float).reshape(-1)
        oof[te] = pred
        err = y[te] - pred
        fold_rmse.append(float(np.sqrt(np.mean(err**2))))
        fold_mae.append(float(np.mean(np.abs(err))))
        if progress:
            progress(f"{cand.name}: fold {i}/{k} rmse {fold_rmse[-1]:.4g} cores ({seconds[-1]:.2f} s)")
    abs_err = np.abs(y - oof)
    params = cand.recorded_params(cand.build(seed))
    if picks:  # tuned: the value the outer folds' searches picked most often
        for key in cand.grid:
            values = [_json_safe(p[key]) for p in picks]
            params[key] = max(values, key=values.count)
    return CandidateScore(
        name=cand.name,
        rank=cand.rank,
        eligible=cand.eligible,
        rmse=float(np.mean(fold_rmse)),
        mae=float(np.mean(fold_mae)),
        p95=float(np.quantile(abs_err, 0.95)),
        fit_seconds=float(np.mean(seconds)),
        fold_rmse=tuple(fold_rmse),
        oof=oof,
        params=params,
    )


def _json_safe(v: Any) -> ParamValue:
    return v if isinstance(v, (bool, int, float, str)) or v is None else str(v)


def cross_validate(
    rate: np.ndarray,
    cpu: np.ndarray,
    *,
    candidates: Sequence[Candidate] | None = None,
    folds: int = 5,
    seed: int = 0,
    tune: bool = False,
    progress: Progress | None = None,
) -> list[CandidateScore]:
    """Score every candidate on the same shuffled K folds (see the module docstring)."""
    X = _as_X(rate)
    y = np.asarray(cpu, dtype=float).reshape(-1)
    if y.size < 2 * folds:
        raise NotEnoughData(f"{y.size} samples are too few for {folds}-fold cross-validation")
    cv = make_folds(folds, seed=seed)
    cands = list(candidates) if candidates is not None else get_candidates()
    with threadpool_limits(limits=1):
        return [_one_candidate(c, X, y, cv=cv, seed=seed, tune=tune, progress=progress) for c in cands]


def choose(scores: Sequence[CandidateScore], *, tolerance: float = TIE_TOLERANCE) -> CandidateScore:
    """Lowest CV RMSE among eligible candidates; within ``tolerance`` (relative) of
    it, the lowest simplicity rank wins (then the faster fit)."""
    pool = [s for s in scores if s.eligible and math.isfinite(s.rmse)]
    if not pool:
        raise InputError("no eligible candidate to choose from (the baseline alone is never chosen)")
    best = min(s.rmse for s in pool)
    ties = [s for s in pool if s.rmse <= best * (1.0 + tolerance) + 1e-15]
    return min(ties, key=lambda s: (s.rank, s.fit_seconds))


def conformal_band(residuals: np.ndarray, coverage: float) -> float:
    """One-sided split-conformal quantile of signed residuals (cpu − prediction):
    the ceil((n+1)·coverage)-th smallest (the largest if that exceeds n), floored at 0."""
    if not 0.0 < coverage < 1.0:
        raise InputError(f"coverage: {coverage!r} must lie strictly between 0 and 1 (e.g. 0.95)")
    r = np.sort(np.asarray(residuals, dtype=float).reshape(-1))
    n = r.size
    if n == 0:
        raise NotEnoughData("no residuals to compute the upper band from")
    k = math.ceil((n + 1) * coverage)
    q = r[min(k, n) - 1]
    return max(0.0, float(q))


def fit_final(cand: Candidate, rate: np.ndarray, cpu: np.ndarray, *, seed: int, tune: bool) -> tuple[Any, dict[str, Any]]:
    """Fit ``cand`` on all samples (tuned with an inner search first when asked)."""
    X = _as_X(rate)
    y = np.asarray(cpu, dtype=float).reshape(-1)
    with threadpool_limits(limits=1):
        if tune and cand.grid:
            est, best = _tuned(cand, X, y, seed=seed)
        else:
            est, best = cand.build(seed), {}
        est.fit(X, y)
    return est, best


def select(
    rate: np.ndarray,
    cpu: np.ndarray,
    *,
    candidates: Sequence[Candidate] | None = None,
    folds: int = 5,
    seed: int = 0,
    tune: bool = False,
    coverage: float = 0.95,
    progress: Progress | None = None,
) -> Selection:
    """Cross-validate, choose, compute the band, refit the chosen model on all data."""
    if not 0.0 < coverage < 1.0:
        raise InputError(f"coverage: {coverage!r} must lie strictly between 0 and 1 (e.g. 0.95)")
    cands = list(candidates) if candidates is not None else get_candidates()
    scores = cross_validate(rate, cpu, candidates=cands, folds=folds, seed=seed, tune=tune, progress=progress)
    chosen = choose(scores)
    y = np.asarray(cpu, dtype=float).reshape(-1)
    band = conformal_band(y - chosen.oof, coverage)
    cand = next(c for c in cands if c.name == chosen.name)
    if progress:
        progress(f"chose {chosen.name} (rmse {chosen.rmse:.4g} cores); refitting on all {y.size} samples")
    est, best = fit_final(cand, rate, cpu, seed=seed, tune=tune)
    params = cand.recorded_params(est)
    params.update({k: _json_safe(v) for k, v in best.items()})
    return Selection(scores=scores, chosen=chosen, estimator=est, band=band, coverage=coverage, params=params)
