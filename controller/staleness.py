"""Is a demand model still honest? The exceedance ratio of recent CPU usage above the
model's upper band, judged by a one-sided binomial test (pure: plain values in and out).

A model's band (``demandBound``) is a split-conformal upper band at ``coverage`` (default
0.95): on data like the training data, a new sample lies above it with probability at
most p0 = 1 − coverage. Each pass the controller reads a container's recent per-pod
(rate, cpu) samples over a window (default 6 h) and counts the samples whose CPU usage
exceeds the band at their rate:

    exceedance ratio = k / n,   k = #{i : cpu_i > demandBound(rate_i)}

Under "the model still holds", k is at most Binomial(n, p0). The test is one-sided
(only an excess matters: a band that is too wide wastes CPU but is not dangerous) with

    p-value = P(X ≥ k | X ~ Binomial(n, p0)) = Σ_{i=k..n} C(n, i) p0^i (1 − p0)^(n − i)

and the model is marked stale when p-value < alpha. **Level: alpha = 0.001** (default,
:data:`ALPHA`): a controller passing every few minutes tests each container ~2 000–10 000
times a week; with alpha = 0.001 the expected share of container-passes that fire on a
model that still holds is at most 0.1 %, well under the 1 % we allow (checked by
simulation in ``tests/test_staleness.py``). The test is exact (no normal approximation),
computed in log space so n in the tens of thousands neither under- nor overflows; the
discreteness makes it conservative (the real false-alarm rate is below alpha).

Independence. The binomial law assumes independent samples. Rates over overlapping
windows are correlated, so the controller samples at a step no shorter than the rate
interval (``rate(…[5m])`` every 5 m: disjoint windows; ``controller/usage_source``'s
defaults) — residuals of one pod still carry some autocorrelation, one reason the level
is strict.

Also here: :func:`usage_target_m` — what observed usage asks for when the curve
under-predicts (the p95 of recent usage × (1 + headroom)), used to keep increases going
while the model is stale.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

__all__ = [
    "ALPHA",
    "DEFAULT_COVERAGE",
    "MAX_BAND_POINTS",
    "Staleness",
    "binomial_sf",
    "band_rates",
    "exceedance",
    "judge",
    "usage_target_m",
]

#: the test's level (see the module docstring for why)
ALPHA = 0.001
#: coverage assumed when the model does not say (DESIGN.md "Learning a demand curve", step 5)
DEFAULT_COVERAGE = 0.95
#: the band is asked for at most this many rates per container (then interpolated)
MAX_BAND_POINTS = 60
#: fewer samples than this: too little to judge (with p0 = 0.05 and alpha = 0.001 even
#: n = 12 all above the band gives p = 0.05^12: possible, but a short window says little)
MIN_SAMPLES = 24


def _log_binom_pmf(i: int, n: int, p: float) -> float:
    return (math.lgamma(n + 1) - math.lgamma(i + 1) - math.lgamma(n - i + 1)
            + i * math.log(p) + (n - i) * math.log1p(-p))


def binomial_sf(k: int, n: int, p: float) -> float:
    """P(X ≥ k) for X ~ Binomial(n, p): the one-sided ("greater") p-value of k
    successes in n trials against success probability p. Exact sum in log space
    (log-sum-exp), so it is right for n up to millions."""
    if n < 0 or not 0 <= k or not 0.0 <= p <= 1.0:
        raise ValueError(f"binomial_sf needs 0 <= k, n >= 0 and 0 <= p <= 1, got k={k}, n={n}, p={p}")
    if k <= 0:
        return 1.0
    if k > n:
        return 0.0
    if p == 0.0:
        return 0.0
    if p == 1.0:
        return 1.0
    logs = [_log_binom_pmf(i, n, p) for i in range(k, n + 1)]
    top = max(logs)
    return min(1.0, math.exp(top) * math.fsum(math.exp(v - top) for v in logs))


@dataclass(frozen=True)
class Staleness:
    """One container's verdict on its model this pass."""

    samples: int  # n: (rate, cpu) samples compared
    above: int  # k: samples with cpu above the band at their rate
    nominal: float  # p0 = 1 − coverage
    p_value: float
    alpha: float = ALPHA
    #: p95 of the observed CPU usage over the window (cores), for the usage-driven target
    usage_p95: float | None = None
    #: the model was trained on another image than the container runs now
    image_changed: str | None = None
    #: unix time the excess began (change-point estimate, :func:`change_point`; None: unknown)
    change_at: float | None = None

    @property
    def ratio(self) -> float:
        """The exceedance ratio k / n (0 when nothing was compared)."""
        return self.above / self.samples if self.samples else 0.0

    @property
    def significant(self) -> bool:
        """The excess is significant at ``alpha`` (and there were enough samples)."""
        return self.samples >= MIN_SAMPLES and self.p_value < self.alpha

    @property
    def stale(self) -> bool:
        """Marked stale: a significant excess, or the image changed since training."""
        return self.significant or self.image_changed is not None

    def message(self) -> str:
        """The text for the container's row and status."""
        parts = []
        if self.significant:
            parts.append(
                f"exceedance ratio {self.ratio:.3f} ({self.above} of {self.samples} recent samples above the band; "
                f"nominal {self.nominal:.3f}, one-sided binomial p = {self.p_value:.2g} < {self.alpha:g})")
        if self.image_changed is not None:
            parts.append(self.image_changed)
        return "model stale: " + "; ".join(parts) + "; decreases held, retrain the model" if parts else ""


def band_rates(rates: Sequence[float] | np.ndarray, *, points: int = MAX_BAND_POINTS) -> np.ndarray:
    """At most ``points`` rates, evenly spaced over the samples' range, at which to ask
    for the band (one sizing batch per container stays bounded)."""
    r = np.asarray(rates, dtype=float)
    r = r[np.isfinite(r) & (r >= 0)]
    if r.size == 0:
        return np.zeros(0)
    lo, hi = float(r.min()), float(r.max())
    if hi <= lo:
        return np.array([lo])
    return np.linspace(lo, hi, max(2, min(points, r.size)))


def exceedance(
    rates: Sequence[float] | np.ndarray, cpu: Sequence[float] | np.ndarray,
    grid: Sequence[float] | np.ndarray, bound: Sequence[float] | np.ndarray,
) -> tuple[int, int]:
    """(k, n): samples whose ``cpu`` (cores) exceeds the band at their rate, and the
    samples compared. The band is known at ``grid`` rates (``bound`` cores, from the
    sizing API or the store) and linearly interpolated between them (the served curve is
    itself a linear interpolation on a grid); non-finite samples are left out."""
    r, c = np.asarray(rates, dtype=float), np.asarray(cpu, dtype=float)
    g, b = np.asarray(grid, dtype=float), np.asarray(bound, dtype=float)
    if r.shape != c.shape:
        raise ValueError(f"rates and cpu differ in length ({r.size} vs {c.size})")
    ok = np.isfinite(r) & np.isfinite(c) & (r >= 0)
    if g.size == 0 or not ok.any():
        return 0, 0
    order = np.argsort(g)
    at = np.interp(r[ok], g[order], b[order])
    return int(np.count_nonzero(c[ok] > at)), int(np.count_nonzero(ok))


def judge(
    rates: Sequence[float] | np.ndarray, cpu: Sequence[float] | np.ndarray,
    grid: Sequence[float] | np.ndarray, bound: Sequence[float] | np.ndarray, *,
    coverage: float = DEFAULT_COVERAGE, alpha: float = ALPHA, image_changed: str | None = None,
    timestamps: Sequence[float] | np.ndarray | None = None,
) -> Staleness:
    """The staleness verdict for one container (see the module docstring)."""
    if not 0.0 < coverage < 1.0:
        raise ValueError(f"coverage must be within (0, 1), got {coverage}")
    if not 0.0 < alpha < 1.0:
        raise ValueError(f"alpha must be within (0, 1), got {alpha}")
    k, n = exceedance(rates, cpu, grid, bound)
    p0 = 1.0 - coverage
    c = np.asarray(cpu, dtype=float)
    c = c[np.isfinite(c)]
    p95 = float(np.percentile(c, 95.0)) if c.size else None
    change_at = None
    if timestamps is not None and k:
        change_at = change_point(timestamps, rates, cpu, grid, bound, nominal=p0)
    return Staleness(samples=n, above=k, nominal=p0, p_value=binomial_sf(k, n, p0), alpha=alpha,
                     usage_p95=p95, image_changed=image_changed, change_at=change_at)


def change_point(
    timestamps: Sequence[float] | np.ndarray, rates: Sequence[float] | np.ndarray, cpu: Sequence[float] | np.ndarray,
    grid: Sequence[float] | np.ndarray, bound: Sequence[float] | np.ndarray, *, nominal: float,
) -> float | None:
    """When the excess began: the maximum-likelihood single change point of the
    exceedance indicators x_i ∈ {0, 1} in time order, with the rate p0 before the change
    (the model held) and an unknown rate p1 > p0 after it. For each candidate start τ the
    log-likelihood ratio of "from τ on, rate p̂ = k_τ/n_τ" against "rate p0 throughout" is
    k_τ·log(p̂/p0) + (n_τ − k_τ)·log((1 − p̂)/(1 − p0)) (k_τ, n_τ: exceedances and
    samples from τ on); the estimate is its argmax (the likelihood-ratio form of Page's
    CUSUM, Page 1954). Samples of several pods at one time are pooled per time. None
    without samples."""
    t, r, c = (np.asarray(a, dtype=float) for a in (timestamps, rates, cpu))
    g, b = np.asarray(grid, dtype=float), np.asarray(bound, dtype=float)
    ok = np.isfinite(t) & np.isfinite(r) & np.isfinite(c) & (r >= 0)
    if not ok.any() or g.size == 0:
        return None
    t, r, c = t[ok], r[ok], c[ok]
    order = np.argsort(g)
    above = (c > np.interp(r, g[order], b[order])).astype(float)
    times, inv = np.unique(t, return_inverse=True)
    k_at = np.bincount(inv, weights=above)
    n_at = np.bincount(inv).astype(float)
    k = np.cumsum(k_at[::-1])[::-1]  # exceedances from each time on
    n = np.cumsum(n_at[::-1])[::-1]
    p = k / n
    with np.errstate(divide="ignore", invalid="ignore"):
        llr = (np.where(k > 0, k * np.log(p / nominal), 0.0)
               + np.where(n - k > 0, (n - k) * np.log((1.0 - p) / (1.0 - nominal)), 0.0))
    llr = np.where(p > nominal, llr, 0.0)
    return float(times[int(np.argmax(llr))])


def usage_target_m(usage_p95_cores: float, *, headroom: float) -> int:
    """Millicores observed usage asks for: p95 of recent usage × (1 + headroom), whole
    millicores up (the decision rounds to its own step afterwards)."""
    if not math.isfinite(usage_p95_cores) or usage_p95_cores < 0:
        raise ValueError(f"usage must be a finite number of cores >= 0, got {usage_p95_cores}")
    return int(math.ceil(round(usage_p95_cores * 1000.0 * (1.0 + headroom), 6)))
