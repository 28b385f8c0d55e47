"""Benchmark of the demand models: training time and curve lookups.

Run: ``.venv/bin/python -m tests.bench.bench_models [--sizes 1000,10000,100000] [--no-tune]``

Prints:

- training time (clean + 5-fold CV of all 8 candidates + refit + tabulation) for 1k,
  10k and 100k samples, default and ``--tune`` (nested grid search). With ``--tune``
  the inner grid search runs on at most 20,000 samples of each outer training part
  (``models.select.TUNE_MAX_SAMPLES``); the tuned model is refitted on the whole part.
  Per-candidate mean fit seconds per fold for each run.
- a single curve lookup (``DemandCurve.lookup_one``) against the chosen estimator's
  ``predict`` on one sample; a batch of 10,000 rates (``DemandCurve.lookup``) against
  ``predict`` on 10,000 samples;
- a batch of 10,000 lookups spread over 10,000 different curves stacked in a
  ``CurveBank`` (rows given; and with the key → row mapping included).

Goals (issue 2): single lookup ≥ 100× faster than predict; the 10,000-curve batch
< 2 ms; training 10k samples with all candidates < 30 s on 2 cores. Data: a convex
synthetic curve (cpu = 0.1 + 0.0003·rate² + noise, rate uniform in 0..100 req/s).

The figures last measured, with the machine, are in DEVELOPERS.md (Benchmarks).
"""

from __future__ import annotations

import argparse
import os
import platform
import statistics
import time

import numpy as np
from tests.bench.machine import cpu_model


def _data(n: int, seed: int = 0):
    from ratefit.models.samples import Samples

    rng = np.random.default_rng(seed)
    r = rng.uniform(0, 100, n)
    return Samples(rate=r, cpu=0.1 + 0.0003 * r**2 + rng.normal(0, 0.03, n))


def _best(fn, *, repeat: int = 7, number: int = 1) -> float:
    """Median seconds per call over ``repeat`` rounds of ``number`` calls."""
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        for _ in range(number):
            fn()
        times.append((time.perf_counter() - t0) / number)
    return statistics.median(times)


def bench_training(sizes: list[int], tune_modes: list[bool]):
    from ratefit.models.train import train_key_detailed

    last = None
    print("\n== training (5 folds, all candidates; seconds) ==")
    for n in sizes:
        for tune in tune_modes:
            samples = _data(n)
            t0 = time.perf_counter()
            res = train_key_detailed(samples, key="bench/convex/app", tune=tune, warmup=0)
            secs = time.perf_counter() - t0
            per = ", ".join(f"{s.name} {s.fit_seconds:.3f}" for s in res.selection.scores)
            print(f"n={n:>7,d} tune={'yes' if tune else 'no ':3s} total {secs:7.2f} s  chosen {res.artifact.chosen:10s}"
                  f" | mean fit s/fold: {per}", flush=True)
            if n == 10000 and not tune:
                last = res
            elif last is None and not tune:
                last = res
    return last


def bench_lookups(res) -> None:
    from ratefit.models.curve import CurveBank, DemandCurve

    curve = res.artifact.demand_curve()
    est = res.selection.estimator
    lo, hi = curve.rate_lo, curve.rate_hi
    one = np.array([[0.5 * (lo + hi)]])
    rng = np.random.default_rng(1)
    batch = rng.uniform(lo, hi * 1.1, 10_000)
    print(f"\n== lookups (chosen model: {res.artifact.chosen}) ==")
    t_look1 = _best(lambda: curve.lookup_one(0.5 * (lo + hi)), number=20_000)
    t_pred1 = _best(lambda: est.predict(one), number=200)
    print(f"single: curve.lookup_one {t_look1 * 1e6:8.2f} µs   estimator.predict {t_pred1 * 1e6:9.1f} µs"
          f"   ratio {t_pred1 / t_look1:,.0f}×")
    t_lookv1 = _best(lambda: curve.lookup(0.5 * (lo + hi)), number=5_000)
    print(f"single (vectorised curve.lookup): {t_lookv1 * 1e6:.2f} µs  ratio {t_pred1 / t_lookv1:,.0f}×")
    t_lookb = _best(lambda: curve.lookup(batch), number=50)
    t_predb = _best(lambda: est.predict(batch.reshape(-1, 1)), number=5)
    print(f"batch of 10,000: curve.lookup {t_lookb * 1e3:8.3f} ms   estimator.predict {t_predb * 1e3:8.3f} ms"
          f"   ratio {t_predb / t_lookb:,.0f}×")

    # 10,000 curves in one bank; 10,000 lookups spread over all of them
    m = 10_000
    base = curve.cpu
    curves = {}
    for i in range(m):
        scale = 0.5 + (i % 97) / 50.0
        curves[f"ns{i % 50}/wl-{i}/app"] = DemandCurve(rate_lo=lo, rate_hi=hi * (0.5 + (i % 13) / 10),
                                                       cpu=base * scale, band=0.01 * (i % 7))
    t0 = time.perf_counter()
    bank = CurveBank(curves)
    t_build = time.perf_counter() - t0
    keys = list(curves)
    perm = rng.permutation(m)
    qkeys = [keys[j] for j in perm]
    rows = bank.rows(qkeys)
    rates = rng.uniform(0, hi * 1.2, m)
    t_bank = _best(lambda: bank.lookup(rows, rates), number=20)
    t_bank_keys = _best(lambda: bank.lookup(bank.rows(qkeys), rates), number=20)
    print(f"bank of {m:,d} curves (built in {t_build * 1e3:.0f} ms): 10,000 lookups over 10,000 curves "
          f"{t_bank * 1e3:.3f} ms (rows given), {t_bank_keys * 1e3:.3f} ms (with key → row mapping)")


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--sizes", default="1000,10000,100000", help="comma-separated sample counts")
    p.add_argument("--no-tune", action="store_true", help="skip the --tune runs")
    args = p.parse_args()
    sizes = [int(s) for s in args.sizes.split(",") if s]
    import sklearn

    print(f"ratefit models benchmark — nproc {os.cpu_count()}, CPU {cpu_model()}, "
          f"python {platform.python_version()}, scikit-learn {sklearn.__version__}, numpy {np.__version__}")
    try:
        print(f"load average at start: {os.getloadavg()[0]:.2f} (the machine may be shared)")
    except OSError:
        pass
    res = bench_training(sizes, [False] if args.no_tune else [False, True])
    bench_lookups(res)


if __name__ == "__main__":
    main()
