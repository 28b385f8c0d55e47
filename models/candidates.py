"""Candidate estimators for a demand curve (rate per pod → CPU cores) and their grids.

Words: each candidate is an *estimator* (a family fitted to samples); the stored
per-container result is a *model* (``models.store``).

Each :class:`Candidate` names a scikit-learn estimator, a simplicity rank (lower is
simpler and faster; ties in cross-validated error go to the lower rank) and a
small hyperparameter grid used only with ``--tune``.

The candidates, simplest first:

=========  ====  ================================================================
name       rank  estimator
=========  ====  ================================================================
fixed      0     scikit-learn's ``DummyRegressor(strategy="quantile",
                 quantile=0.95)``: a constant, the 0.95 quantile of the CPU seen
                 in training — what a hand-set request sized to cover the busy
                 hours does (common practice, no source). The baseline to beat;
                 reported, never chosen (a constant at a high quantile is biased
                 as a *demand* estimate).
linear     1     ordinary least squares (the Utilization Law's shape U = X·S + base)
polynomial 2     scaled rate → degree-3 polynomial features → ridge (alpha 1e-3)
isotonic   3     isotonic regression (non-decreasing step function)
gboost     4     histogram gradient boosting, monotone increasing in rate
                 (``monotonic_cst=[1]``), early stopping on a 10% validation split
svr        5     RBF support vector regression, rate and CPU standardised; fitted
                 on at most 2,000 randomly drawn training samples (SVR fits cost
                 O(n²)); errors are still measured on every held-out sample
forest     6     random forest, 40 trees, leaves of >= 5 samples, each tree
                 bootstrapped from at most 20,000 samples
mlp        7     one hidden layer of 16 tanh units, rate and CPU standardised, adam
                 with early stopping
=========  ====  ================================================================

The project's own estimator classes (:class:`Subsampled` and the capped random
forest) follow scikit-learn's estimator contract and are run through
``sklearn.utils.estimator_checks.parametrize_with_checks`` in
``tests/test_candidates_sklearn_checks.py`` (the checks skipped there, and why,
are listed beside them).

Sizes are picked to keep training 10,000 samples with every candidate and 5 folds
well under 30 s on 2 cores (measured by ``tests/bench/bench_models.py``); all
estimators run single-threaded (``n_jobs=1``) because the machine is shared.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.sparse import issparse
from sklearn.base import BaseEstimator, RegressorMixin, clone
from sklearn.compose import TransformedTargetRegressor
from sklearn.dummy import DummyRegressor
from sklearn.ensemble import HistGradientBoostingRegressor, RandomForestRegressor
from sklearn.isotonic import IsotonicRegression
from sklearn.linear_model import LinearRegression, Ridge
from sklearn.neural_network import MLPRegressor
from sklearn.pipeline import Pipeline
from sklearn.preprocessing import PolynomialFeatures, StandardScaler
from sklearn.svm import SVR
from sklearn.utils.validation import check_array, check_is_fitted, check_X_y

from ratefit.models.errors import InputError

__all__ = [
    "Candidate",
    "Subsampled",
    "CappedForest",
    "CANDIDATES",
    "BASELINE",
    "candidate_names",
    "get_candidates",
]

#: name of the baseline candidate (reported, never chosen)
BASELINE = "fixed"
SVR_MAX_SAMPLES = 2000
FOREST_MAX_SAMPLES = 20000


class Subsampled(RegressorMixin, BaseEstimator):
    """Fits ``estimator`` on at most ``max_samples`` training samples drawn at
    random (seeded); predicts with it on any input. For estimators whose fit cost
    grows quadratically (SVR). Honest in CV: the held-out fold is never subsampled."""

    def __init__(self, estimator: Any = None, max_samples: int = SVR_MAX_SAMPLES, random_state: int = 0) -> None:
        self.estimator = estimator
        self.max_samples = max_samples
        self.random_state = random_state

    def fit(self, X: Any, y: Any) -> Subsampled:
        if self.estimator is None:
            raise InputError("Subsampled: no estimator given (e.g. Subsampled(estimator=SVR()))")
        if isinstance(self.max_samples, bool) or not isinstance(self.max_samples, (int, np.integer)) \
                or self.max_samples < 1:
            raise InputError(f"Subsampled: max_samples {self.max_samples!r} must be an integer >= 1")
        X, y = check_X_y(X, y, dtype=float, y_numeric=True)
        if X.shape[0] > self.max_samples:
            rng = np.random.default_rng(self.random_state)
            pick = np.sort(rng.choice(X.shape[0], self.max_samples, replace=False))
            X, y = X[pick], y[pick]
        self.estimator_ = clone(self.estimator).fit(X, y)
        self.n_features_in_ = X.shape[1]
        return self

    def predict(self, X: Any) -> np.ndarray:
        check_is_fitted(self, "estimator_")
        X = check_array(X, dtype=float)
        if X.shape[1] != self.n_features_in_:
            raise ValueError(
                f"X has {X.shape[1]} features, but {type(self).__name__} is expecting "
                f"{self.n_features_in_} features as input"
            )
        return self.estimator_.predict(X)


def _scaled_target(regressor: Any) -> TransformedTargetRegressor:
    return TransformedTargetRegressor(regressor=regressor, transformer=StandardScaler())


@dataclass(frozen=True)
class Candidate:
    """One candidate estimator: ``build(seed)`` returns a fresh, unfitted estimator;
    ``grid`` is the ``GridSearchCV`` parameter grid for ``--tune`` (empty: nothing
    to tune); ``params`` names the estimator parameters worth recording."""

    name: str
    rank: int
    build: Callable[[int], Any]
    grid: Mapping[str, Sequence[Any]] = field(default_factory=dict)
    params: Sequence[str] = ()
    eligible: bool = True
    summary: str = ""

    def recorded_params(self, estimator: Any) -> dict[str, float | int | str | bool | None]:
        """The parameters named in ``params`` (plus any grid keys) with JSON-safe values."""
        all_params = estimator.get_params(deep=True)
        out: dict[str, float | int | str | bool | None] = {}
        for key in (*self.params, *[k for k in self.grid if k not in self.params]):
            v = all_params.get(key)
            if isinstance(v, (bool, int, float, str)) or v is None:
                out[key] = v
            else:
                out[key] = str(v)
        return out


def _fixed(seed: int) -> Any:
    return DummyRegressor(strategy="quantile", quantile=0.95)


def _linear(seed: int) -> Any:
    return LinearRegression()


def _polynomial(seed: int) -> Any:
    return Pipeline(
        [
            ("scale", StandardScaler()),
            ("poly", PolynomialFeatures(degree=3, include_bias=False)),
            ("ridge", Ridge(alpha=1e-3)),
        ]
    )


def _isotonic(seed: int) -> Any:
    return IsotonicRegression(increasing=True, out_of_bounds="clip")


def _gboost(seed: int) -> Any:
    return HistGradientBoostingRegressor(
        monotonic_cst=[1],
        max_iter=200,
        learning_rate=0.1,
        max_leaf_nodes=15,
        min_samples_leaf=20,
        early_stopping=True,
        validation_fraction=0.1,
        n_iter_no_change=10,
        random_state=seed,
    )


def _svr(seed: int) -> Any:
    inner = _scaled_target(Pipeline([("scale", StandardScaler()), ("svr", SVR(kernel="rbf", C=3.0, epsilon=0.05))]))
    return Subsampled(estimator=inner, max_samples=SVR_MAX_SAMPLES, random_state=seed)


class CappedForest(RandomForestRegressor):
    """A random forest whose bootstrap draws at most FOREST_MAX_SAMPLES samples."""

    def fit(self, X: Any, y: Any, sample_weight: Any = None) -> CappedForest:
        # len() of the rows without converting: np.asarray would turn a sparse matrix
        # into a 0-d object array (found by scikit-learn's estimator checks)
        n = X.shape[0] if issparse(X) else np.asarray(X).shape[0]
        saved = self.max_samples
        if n > FOREST_MAX_SAMPLES:  # cap the bootstrap for this fit, keep the parameter as set
            self.max_samples = FOREST_MAX_SAMPLES
        try:
            return super().fit(X, y, sample_weight=sample_weight)
        finally:
            self.max_samples = saved


def _forest(seed: int) -> Any:
    return CappedForest(n_estimators=40, min_samples_leaf=5, n_jobs=1, random_state=seed)


def _mlp(seed: int) -> Any:
    return _scaled_target(
        Pipeline(
            [
                ("scale", StandardScaler()),
                (
                    "mlp",
                    MLPRegressor(
                        hidden_layer_sizes=(16,),
                        activation="tanh",
                        alpha=1e-4,
                        learning_rate_init=0.01,
                        max_iter=300,
                        early_stopping=True,
                        n_iter_no_change=10,
                        random_state=seed,
                    ),
                ),
            ]
        )
    )


CANDIDATES: tuple[Candidate, ...] = (
    Candidate("fixed", 0, _fixed, params=("quantile",), eligible=False,
              summary="constant at the 0.95 quantile of observed CPU (baseline)"),
    Candidate("linear", 1, _linear, summary="least squares line"),
    Candidate("polynomial", 2, _polynomial,
              grid={"poly__degree": [2, 3], "ridge__alpha": [1e-4, 1e-2, 1.0]},
              params=("poly__degree", "ridge__alpha"), summary="scaled polynomial + ridge"),
    Candidate("isotonic", 3, _isotonic, summary="isotonic (non-decreasing) regression"),
    Candidate("gboost", 4, _gboost,
              grid={"learning_rate": [0.05, 0.2], "max_leaf_nodes": [7, 15]},
              params=("learning_rate", "max_leaf_nodes", "max_iter"),
              summary="gradient boosting, monotone in rate"),
    Candidate("svr", 5, _svr,
              grid={"estimator__regressor__svr__C": [1.0, 10.0],
                    "estimator__regressor__svr__epsilon": [0.02, 0.1]},
              params=("estimator__regressor__svr__C", "estimator__regressor__svr__epsilon", "max_samples"),
              summary="RBF support vector regression (scaled)"),
    Candidate("forest", 6, _forest,
              grid={"min_samples_leaf": [2, 5, 20]},
              params=("n_estimators", "min_samples_leaf"), summary="random forest"),
    Candidate("mlp", 7, _mlp,
              grid={"regressor__mlp__hidden_layer_sizes": [(8,), (32,)],
                    "regressor__mlp__alpha": [1e-4, 1e-2]},
              params=("regressor__mlp__hidden_layer_sizes", "regressor__mlp__alpha"),
              summary="one-hidden-layer perceptron (scaled in and out)"),
)


def candidate_names() -> list[str]:
    return [c.name for c in CANDIDATES]


def get_candidates(names: Sequence[str] | None = None) -> list[Candidate]:
    """The candidates named (all by default), in rank order; InputError for unknown names."""
    if names is None:
        return list(CANDIDATES)
    by_name = {c.name: c for c in CANDIDATES}
    unknown = [n for n in names if n not in by_name]
    if unknown:
        raise InputError(f"unknown candidate(s) {', '.join(unknown)}; choose from {', '.join(by_name)}")
    return sorted((by_name[n] for n in dict.fromkeys(names)), key=lambda c: c.rank)
