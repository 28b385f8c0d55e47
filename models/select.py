"""Choosing a demand estimator: k-fold cross-validation, the choice rule, the upper band.

Words: the family fitted here (linear, svr, …) is an *estimator*; the stored
per-container result (curve, band, provenance) is a *model* (``models.store``).

Every function takes one :class:`~ratefit.models.options.TrainOptions` (folds,
seed, tune, coverage, cv scheme and gap, candidates); keyword overrides such as
``select(rate, cpu, folds=3)`` build or amend it, so the list of knobs lives in
one place.

Cross-validation. The folds are the same for every candidate. Two schemes (see
``models.options`` for the details):

- ``blocked`` (default when the samples have timestamps): the distinct timestamps,
  in time order, cut into ``folds`` contiguous blocks with the fold sizes of
  ``KFold(n_splits=folds, shuffle=False)``; optionally ``cv_gap`` seconds of
  training samples left out on each side of the held-out block;
- ``shuffled`` (default without timestamps): ``KFold(n_splits=folds, shuffle=True,
  random_state=seed)``.

Each candidate is fitted on the training part of each fold and predicts the
held-out part, which gives one out-of-fold prediction per sample. Reported per
candidate (cores):

- ``rmse``: the mean over folds of the fold's root mean squared error — the figure
  scikit-learn's ``cross_val_score(..., scoring="neg_root_mean_squared_error")``
  reports (negated) on the same folds, so the two can be checked against each other;
- ``mae``: the mean over folds of the fold's mean absolute error;
- ``p95``: the 0.95 quantile of all out-of-fold absolute errors;
- ``fit_seconds``: mean wall time of one fold's fit (with the inner search when tuned).

Shuffling flatters. On a time series neighbouring samples are alike; shuffled
folds put a held-out minute's neighbours into the training part, so the error
(and the band built from it) comes out smaller than on a later week. When the
samples have timestamps, :func:`select` also scores the chosen estimator and the
baseline with the *other* scheme (``compare_cv``, on by default; two candidates,
not all, to keep training fast) so the report can show both figures side by side.

Choice. The lowest RMSE wins, except that any eligible candidate within 2% of the
best RMSE counts as a tie and the tie goes to the lowest simplicity rank (simpler
and faster; see ``models.candidates``). The fixed-allocation baseline is scored but
never chosen.

Tuning (``tune=True``) is nested, so the reported error stays honest: inside each
outer fold a ``GridSearchCV`` (3 inner folds of the same scheme — shuffled with the
same seed, or blocked in time — scored by RMSE) picks the parameters on the outer
training part only (on a random subsample of at most ``TUNE_MAX_SAMPLES`` of it, to
bound the cost on large inputs), the candidate is refitted with them on the whole
outer training part and scored on the outer held-out fold. The outer folds never
inform the parameter choice. The final estimator is tuned the same way on all
samples and refitted on all of them; its parameters are the chosen row's
``params``; the other rows record, per grid parameter, the value the outer folds'
searches picked most often.

Threads. Every fit runs with OpenMP and BLAS limited to one thread
(``threadpoolctl``): on a shared 2-core machine, gradient boosting's OpenMP threads
spinning against other work made its fits about 7× slower than one thread.

Upper band. One-sided split-conformal quantile (Vovk et al. 2005; Lei et al. 2018)
of the chosen estimator's *signed* out-of-fold residuals r = cpu − prediction: with n
residuals and coverage c, the band is the k-th smallest residual,
k = ceil((n + 1)·c) (the whole range's maximum if k > n), floored at 0. Then
"cpu ≤ demand + band" holds with probability ≥ c on a new sample from the same
distribution. One-sided because the question the sizing answers is one-sided
("demand will be at most X"); an absolute-residual band would spend half its
miss budget on over-predictions that never starve a pod. The band is one constant
over the whole rate range (it does not widen where the noise does). Strictly, the
finite-sample guarantee is for residuals from a split the estimator never saw; K-fold
out-of-fold residuals of estimators refitted on all data are the cross-conformal
variant, whose guarantee is slightly weaker in theory (from memory: Barber et al.
2021, "jackknife+"); ``tests/test_select.py`` checks the empirical coverage on
fresh data at two levels. With blocked folds the residuals come from held-out
*later or earlier stretches of time*, which is what the band must cover in
production (exchangeability does not hold on a time series; the blocked residuals
are the closer stand-in, not a guarantee).
"""

from __future__ import annotations

import dataclasses
import math
import time
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from sklearn.base import clone
from sklearn.model_selection import GridSearchCV, KFold
from threadpoolctl import threadpool_limits

from ratefit.models.candidates import BASELINE, Candidate, get_candidates
from ratefit.models.errors import InputError, NotEnoughData
from ratefit.models.options import CVScheme, TrainOptions

__all__ = [
    "CandidateScore",
    "CVComparison",
    "Selection",
    "TIE_TOLERANCE",
    "INNER_FOLDS",
    "TUNE_MAX_SAMPLES",
    "make_folds",
    "blocked_folds",
    "resolve_scheme",
    "cv_splits",
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
Split = tuple[np.ndarray, np.ndarray]


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
class CVComparison:
    """The chosen estimator and the baseline scored with the *other* scheme, and
    the band the chosen estimator's residuals would give under it."""

    scheme: CVScheme
    scores: tuple[CandidateScore, ...]
    band: float

    def score(self, name: str) -> CandidateScore | None:
        return next((s for s in self.scores if s.name == name), None)


@dataclass(frozen=True, eq=False)
class Selection:
    """The outcome of ``select``: every score, the chosen one, its refitted
    estimator (on all samples), the band and the coverage it was computed for,
    the cross-validation scheme used and (with timestamps) the comparison."""

    scores: list[CandidateScore]
    chosen: CandidateScore
    estimator: Any
    band: float
    coverage: float
    params: dict[str, ParamValue]
    cv: CVScheme = CVScheme.SHUFFLED
    cv_gap: float = 0.0
    comparison: CVComparison | None = None

    def score(self, name: str) -> CandidateScore:
        for s in self.scores:
            if s.name == name:
                return s
        raise KeyError(name)

    def rmse_by_scheme(self, name: str) -> dict[str, float]:
        """``{scheme: rmse}`` for ``name`` under the scheme used and, when scored, the other."""
        out = {self.cv.value: self.score(name).rmse}
        other = self.comparison.score(name) if self.comparison else None
        if other is not None and self.comparison is not None:
            out[self.comparison.scheme.value] = other.rmse
        return out


def make_folds(folds: int, *, seed: int) -> KFold:
    """The shuffled scheme's splitter."""
    if folds < 2:
        raise InputError(f"folds: {folds} must be at least 2")
    return KFold(n_splits=folds, shuffle=True, random_state=seed)


def _times(timestamps: Any, n: int) -> np.ndarray | None:
    if timestamps is None:
        return None
    t = np.asarray(timestamps, dtype=float).reshape(-1)
    if t.size != n:
        raise InputError(f"timestamps: {t.size} values for {n} samples")
    if not np.all(np.isfinite(t)):
        raise InputError("timestamps: every sample needs a finite time (unix seconds) for blocked cross-validation")
    return t


def blocked_folds(timestamps: np.ndarray, folds: int, *, gap: float = 0.0) -> list[Split]:
    """Contiguous time blocks (see ``models.options``): ``[(train, test), …]`` index
    arrays, block 0 the earliest. The blocks split the *distinct* timestamps with
    the fold sizes of ``KFold(folds, shuffle=False)``; a training sample closer than
    ``gap`` seconds to any held-out sample is left out of that fold's training part."""
    if folds < 2:
        raise InputError(f"folds: {folds} must be at least 2")
    t = np.asarray(timestamps, dtype=float).reshape(-1)
    uniq, inv = np.unique(t, return_inverse=True)
    u = uniq.size
    if u < folds:
        raise NotEnoughData(
            f"{u} distinct timestamps are too few for {folds} time blocks: use fewer folds or --cv shuffled"
        )
    sizes = np.full(folds, u // folds)
    sizes[: u % folds] += 1
    ends = np.cumsum(sizes)
    block = np.searchsorted(ends, inv, side="right")
    out: list[Split] = []
    for b in range(folds):
        test = np.flatnonzero(block == b)
        keep = block != b
        if gap > 0:
            lo, hi = float(t[test].min()), float(t[test].max())
            keep &= ~((t > lo - gap) & (t < hi + gap))
        train = np.flatnonzero(keep)
        if train.size == 0:
            raise NotEnoughData(f"cv gap {gap:g} s leaves no training sample for time block {b + 1}: use a smaller gap")
        out.append((train, test))
    return out


def resolve_scheme(requested: CVScheme | str | None, timestamps: np.ndarray | None, *, folds: int) -> CVScheme:
    """The scheme to use: the requested one, or blocked when there are timestamps
    enough for ``folds`` blocks of at least two distinct times, else shuffled."""
    if requested is not None:
        scheme = CVScheme(requested)
        if scheme is CVScheme.BLOCKED and timestamps is None:
            raise InputError(
                "blocked cross-validation needs timestamps and these samples have none: "
                "add a timestamp column, or use --cv shuffled"
            )
        return scheme
    if timestamps is not None and np.unique(timestamps).size >= 2 * folds:
        return CVScheme.BLOCKED
    return CVScheme.SHUFFLED


def cv_splits(
    scheme: CVScheme, n: int, *, folds: int, seed: int, timestamps: np.ndarray | None, gap: float = 0.0
) -> list[Split]:
    """The (train, test) index pairs of ``scheme`` over ``n`` samples."""
    if scheme is CVScheme.BLOCKED:
        if timestamps is None:
            raise InputError("blocked cross-validation needs timestamps: use --cv shuffled")
        return blocked_folds(timestamps, folds, gap=gap)
    return list(make_folds(folds, seed=seed).split(np.zeros((n, 1))))


def _as_X(rate: np.ndarray) -> np.ndarray:
    return np.asarray(rate, dtype=float).reshape(-1, 1)


def _tuned(
    cand: Candidate, X: np.ndarray, y: np.ndarray, t: np.ndarray | None, *, scheme: CVScheme, opts: TrainOptions
) -> tuple[Any, dict[str, Any]]:
    """Search ``cand.grid`` with inner CV (same scheme) on (a subsample of) X, y;
    return an unfitted estimator set to the best parameters, and those parameters."""
    est = cand.build(opts.seed)
    if not cand.grid:
        return est, {}
    if X.shape[0] > TUNE_MAX_SAMPLES:
        rng = np.random.default_rng(opts.seed)
        pick = np.sort(rng.choice(X.shape[0], TUNE_MAX_SAMPLES, replace=False))
        X, y, t = X[pick], y[pick], (None if t is None else t[pick])
    inner: Any
    if scheme is CVScheme.BLOCKED:
        inner = cv_splits(scheme, y.size, folds=INNER_FOLDS, seed=opts.seed, timestamps=t, gap=opts.cv_gap)
    else:
        inner = KFold(n_splits=INNER_FOLDS, shuffle=True, random_state=opts.seed)
    search = GridSearchCV(
        est,
        {k: list(v) for k, v in cand.grid.items()},
        cv=inner,
        scoring="neg_root_mean_squared_error",
        refit=False,
        n_jobs=1,
        error_score="raise",
    )
    search.fit(X, y)
    best = dict(search.best_params_)
    return clone(est).set_params(**best), best


def _one_candidate(
    cand: Candidate,
    X: np.ndarray,
    y: np.ndarray,
    t: np.ndarray | None,
    *,
    splits: Sequence[Split],
    scheme: CVScheme,
    opts: TrainOptions,
    progress: Progress | None,
    label: str = "",
) -> CandidateScore:
    oof = np.empty(y.size)
    fold_rmse: list[float] = []
    fold_mae: list[float] = []
    seconds: list[float] = []
    picks: list[dict[str, Any]] = []
    k = len(splits)
    for i, (tr, te) in enumerate(splits, start=1):
        t0 = time.perf_counter()
        if opts.tune and cand.grid:
            est, best = _tuned(cand, X[tr], y[tr], None if t is None else t[tr], scheme=scheme, opts=opts)
            picks.append(best)
        else:
            est = cand.build(opts.seed)
        est.fit(X[tr], y[tr])
        seconds.append(time.perf_counter() - t0)
        pred = np.asarray(est.predict(X[te]), dtype=float).reshape(-1)
        oof[te] = pred
        err = y[te] - pred
        fold_rmse.append(float(np.sqrt(np.mean(err**2))))
        fold_mae.append(float(np.mean(np.abs(err))))
        if progress:
            progress(
                f"{cand.name}{label}: fold {i}/{k} rmse {fold_rmse[-1]:.4g} cores ({seconds[-1]:.2f} s)"
            )
    abs_err = np.abs(y - oof)
    params = cand.recorded_params(cand.build(opts.seed))
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


def _arrays(rate: np.ndarray, cpu: np.ndarray, timestamps: Any) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
    X = _as_X(rate)
    y = np.asarray(cpu, dtype=float).reshape(-1)
    if X.shape[0] != y.size:
        raise InputError(f"rate and cpu have different lengths ({X.shape[0]} vs {y.size})")
    return X, y, _times(timestamps, y.size)


def _score_all(
    cands: Sequence[Candidate],
    X: np.ndarray,
    y: np.ndarray,
    t: np.ndarray | None,
    *,
    scheme: CVScheme,
    opts: TrainOptions,
    progress: Progress | None,
    label: str = "",
) -> list[CandidateScore]:
    if y.size < 2 * opts.folds:
        raise NotEnoughData(f"{y.size} samples are too few for {opts.folds}-fold cross-validation")
    splits = cv_splits(scheme, y.size, folds=opts.folds, seed=opts.seed, timestamps=t, gap=opts.cv_gap)
    with threadpool_limits(limits=1):
        return [
            _one_candidate(c, X, y, t, splits=splits, scheme=scheme, opts=opts, progress=progress, label=label)
            for c in cands
        ]


def cross_validate(
    rate: np.ndarray,
    cpu: np.ndarray,
    options: TrainOptions | None = None,
    *,
    timestamps: Any = None,
    progress: Progress | None = None,
    **overrides: Any,
) -> list[CandidateScore]:
    """Score every candidate on the same K folds of the resolved scheme (see the
    module docstring); ``overrides`` amend ``options`` (e.g. ``folds=3``)."""
    opts = TrainOptions.of(options, **overrides)
    X, y, t = _arrays(rate, cpu, timestamps)
    scheme = resolve_scheme(opts.cv, t, folds=opts.folds)
    cands = list(opts.candidates) if opts.candidates is not None else get_candidates()
    return _score_all(cands, X, y, t, scheme=scheme, opts=opts, progress=progress)


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


def fit_final(
    cand: Candidate,
    rate: np.ndarray,
    cpu: np.ndarray,
    options: TrainOptions | None = None,
    *,
    timestamps: Any = None,
    **overrides: Any,
) -> tuple[Any, dict[str, Any]]:
    """Fit ``cand`` on all samples (tuned with an inner search first when asked)."""
    opts = TrainOptions.of(options, **overrides)
    X, y, t = _arrays(rate, cpu, timestamps)
    with threadpool_limits(limits=1):
        if opts.tune and cand.grid:
            scheme = resolve_scheme(opts.cv, t, folds=INNER_FOLDS)
            est, best = _tuned(cand, X, y, t, scheme=scheme, opts=opts)
        else:
            est, best = cand.build(opts.seed), {}
        est.fit(X, y)
    return est, best


def select(
    rate: np.ndarray,
    cpu: np.ndarray,
    options: TrainOptions | None = None,
    *,
    timestamps: Any = None,
    progress: Progress | None = None,
    **overrides: Any,
) -> Selection:
    """Cross-validate, choose, compute the band, refit the chosen estimator on all
    data; with timestamps (and ``compare_cv``) also score the chosen estimator and
    the baseline with the other scheme."""
    opts = TrainOptions.of(options, **overrides)
    X, y, t = _arrays(rate, cpu, timestamps)
    scheme = resolve_scheme(opts.cv, t, folds=opts.folds)
    cands = list(opts.candidates) if opts.candidates is not None else get_candidates()
    scores = _score_all(cands, X, y, t, scheme=scheme, opts=opts, progress=progress)
    chosen = choose(scores)
    band = conformal_band(y - chosen.oof, opts.coverage)
    cand = next(c for c in cands if c.name == chosen.name)
    comparison = None
    if t is not None and opts.compare_cv:
        other = scheme.other()
        pair = [c for c in cands if c.name == BASELINE] + [cand]
        try:
            alt = _score_all(pair, X, y, t, scheme=other, opts=opts, progress=progress,
                             label=f" [{other.value}, for comparison]")
        except NotEnoughData as exc:
            if progress:
                progress(f"no {other.value} comparison: {exc}")
        else:
            comparison = CVComparison(scheme=other, scores=tuple(alt),
                                      band=conformal_band(y - alt[-1].oof, opts.coverage))
    if progress:
        progress(
            f"chose {chosen.name} ({scheme.value} CV RMSE {chosen.rmse:.4g} cores); "
            f"refitting on all {y.size} samples"
        )
    est, best = fit_final(cand, rate, cpu, dataclasses.replace(opts, cv=scheme), timestamps=t)
    params = cand.recorded_params(est)
    params.update({k: _json_safe(v) for k, v in best.items()})
    return Selection(
        scores=scores, chosen=chosen, estimator=est, band=band, coverage=opts.coverage, params=params,
        cv=scheme, cv_gap=opts.cv_gap if scheme is CVScheme.BLOCKED else 0.0, comparison=comparison,
    )
