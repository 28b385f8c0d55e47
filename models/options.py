"""TrainOptions: every knob of one training run, in one frozen, keyword-only record.

The same record is read by ``models.select`` (folds, seed, tuning, coverage, the
cross-validation scheme, the candidates), by ``models.train`` (also the cleaning
thresholds) and built once by ``ratefit train`` from its flags. Values are checked
here, once, so a bad value fails with one message before any work starts.

Cross-validation scheme (``cv``):

- ``"blocked"`` — contiguous time blocks: the samples' distinct timestamps are
  cut, in time order, into ``folds`` blocks of (nearly) equal size, the same sizes
  scikit-learn's ``KFold(shuffle=False)`` gives; each block is held out once and
  the others train. Neighbouring minutes of an autocorrelated series then never sit
  on both sides of a split, except at the block edges. ``cv_gap`` (seconds, default
  0) leaves out of the training part every sample closer than that to the held-out
  block, which removes the edge leak too (at the cost of less training data); a gap
  about as long as the series' correlation time is the usual choice (common
  practice, no source). Samples sharing a timestamp (several pods in one step)
  always land in the same block.
- ``"shuffled"`` — ``KFold(shuffle=True, random_state=seed)``: every sample drawn
  into a random fold. Right for independent samples; on a time series it is
  optimistic (a held-out minute's neighbours trained the model).
- ``None`` (default) — blocked when the samples have timestamps, shuffled otherwise.

The split-conformal band is computed from the out-of-fold residuals of the
scheme actually used, so it inherits the same honesty (or optimism).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from enum import StrEnum
from typing import Any
from numbers import Integral, Real

from ratefit.models.candidates import Candidate
from ratefit.models.errors import InputError
from ratefit.models.samples import DEFAULT_THROTTLE_THRESHOLD, DEFAULT_WARMUP_SECONDS

__all__ = ["CVScheme", "TrainOptions"]


class CVScheme(StrEnum):
    BLOCKED = "blocked"
    SHUFFLED = "shuffled"

    def other(self) -> CVScheme:
        return CVScheme.SHUFFLED if self is CVScheme.BLOCKED else CVScheme.BLOCKED


@dataclass(frozen=True, kw_only=True)
class TrainOptions:
    """How to train (see the module docstring for ``cv`` and ``cv_gap``).

    - ``folds``: cross-validation folds (>= 2);
    - ``seed``: seed for the shuffled folds, subsamples and estimators;
    - ``tune``: nested grid search of each candidate's parameters;
    - ``coverage``: the upper band's coverage, strictly between 0 and 1;
    - ``cv``: ``"blocked"``, ``"shuffled"`` or None (blocked when timestamps exist);
    - ``cv_gap``: seconds left out of training on each side of a held-out block;
    - ``compare_cv``: also score the chosen estimator and the baseline with the other
      scheme (when the samples have timestamps), so the report can show both;
    - ``candidates``: the candidate estimators (None: all of ``models.candidates``);
    - ``throttle_threshold``, ``warmup``: cleaning (see ``models.samples``).
    """

    folds: int = 5
    seed: int = 0
    tune: bool = False
    coverage: float = 0.95
    cv: CVScheme | None = None
    cv_gap: float = 0.0
    compare_cv: bool = True
    candidates: tuple[Candidate, ...] | None = field(default=None, compare=False)
    throttle_threshold: float = DEFAULT_THROTTLE_THRESHOLD
    warmup: float = DEFAULT_WARMUP_SECONDS

    @classmethod
    def of(cls, options: TrainOptions | None = None, **overrides: Any) -> TrainOptions:
        """``options`` amended by ``overrides`` (defaults when ``options`` is None): the
        one place keyword arguments such as ``select(..., folds=3)`` become options."""
        if options is None:
            return cls(**overrides)
        return dataclasses.replace(options, **overrides) if overrides else options

    def __post_init__(self) -> None:
        if isinstance(self.folds, bool) or not isinstance(self.folds, Integral) or self.folds < 2:
            raise InputError(f"folds: {self.folds!r} must be at least 2")
        if isinstance(self.seed, bool) or not isinstance(self.seed, Integral):
            raise InputError(f"seed: {self.seed!r} must be an integer")
        object.__setattr__(self, "folds", int(self.folds))
        object.__setattr__(self, "seed", int(self.seed))
        if not (isinstance(self.coverage, Real) and 0.0 < self.coverage < 1.0):
            raise InputError(f"coverage: {self.coverage!r} must lie strictly between 0 and 1 (e.g. 0.95)")
        if self.cv is not None:
            try:
                object.__setattr__(self, "cv", CVScheme(self.cv))
            except ValueError:
                raise InputError(f"cv: {self.cv!r} is not a scheme; choose blocked or shuffled") from None
        if not (isinstance(self.cv_gap, Real) and math.isfinite(self.cv_gap) and self.cv_gap >= 0):
            raise InputError(f"cv gap: {self.cv_gap!r} must be a finite number of seconds >= 0")
        if self.candidates is not None:
            cands = tuple(self.candidates) if isinstance(self.candidates, Sequence) else None
            if not cands or not all(isinstance(c, Candidate) for c in cands):
                raise InputError("candidates: give a non-empty list from models.candidates.get_candidates()")
            object.__setattr__(self, "candidates", cands)
        if not (isinstance(self.throttle_threshold, Real) and 0.0 <= self.throttle_threshold <= 1.0):
            raise InputError(f"throttle threshold: {self.throttle_threshold!r} must be a share between 0 and 1")
        if not (isinstance(self.warmup, Real) and math.isfinite(self.warmup) and self.warmup >= 0):
            raise InputError(f"warm-up: {self.warmup!r} must be a finite number of seconds >= 0")
