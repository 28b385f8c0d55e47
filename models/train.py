"""Training one key end to end: samples → cleaning → cross-validated choice of an
estimator → DemandCurve → Artifact (the stored model); and many keys from a
directory of CSVs.

This is the library face of ``ratefit train`` (the CLI only parses flags and
prints) and what the demo calls for every scenario key. Every function takes one
:class:`~ratefit.models.options.TrainOptions`; keyword overrides (``coverage=0.9``)
amend it, so the knobs are listed once (in ``models.options``).

- :func:`train_key` ``(samples, *, key, options, …) -> Artifact`` — clean, select, tabulate.
- :func:`train_key_detailed` — the same, also returning the cleaning report, the
  selection (scores, refitted estimator) and the clean samples (for the report).
- :func:`train_many` ``(samples_by_key, …) -> dict[key, Artifact]``.
- :func:`samples_dir_files` ``(dir) -> {key: path}``: a directory holding one CSV
  per key, named ``namespace__workload__container.csv`` (the scenario's
  ``csv_name``) or laid out as ``namespace/workload/container.csv``.
- :func:`train_from_prometheus` — fetch rate/CPU(/throttling) with
  ``fetch_samples`` over a window and train.

The artifact's curve spans the clean samples' rate range; the band is the
split-conformal upper band of the chosen estimator (see ``models.select``). The
samples' timestamps (when present) go to ``select``: cross-validation and the band
are then blocked in time by default (``models.options``); the scheme used and the
comparison with the other scheme are on ``TrainResult.selection``.
"""

from __future__ import annotations

import os
import platform
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np

from ratefit.models.curve import DemandCurve
from ratefit.models.errors import InputError
from ratefit.models.keys import parse_key
from ratefit.models.options import CVScheme, TrainOptions
from ratefit.models.samples import CleanReport, Samples, clean, load_csv
from ratefit.models.select import Selection, select
from ratefit.models.store import Artifact, CurveData, CVRow, DataWindow

__all__ = [
    "TrainOptions",
    "TrainResult",
    "train_key",
    "train_key_detailed",
    "train_many",
    "samples_dir_files",
    "load_samples_dir",
    "train_from_prometheus",
    "rfc3339",
]

Progress = Callable[[str], None]


@dataclass(frozen=True, eq=False)
class TrainResult:
    artifact: Artifact
    report: CleanReport
    selection: Selection
    samples: Samples  # the clean samples the estimator was fitted on
    seconds: float

    @property
    def cv(self) -> CVScheme:
        """The cross-validation scheme used (blocked in time or shuffled)."""
        return self.selection.cv

    def summary(self) -> str:
        """One line: chosen estimator, its CV error(s), the band (for the CLI and logs)."""
        a, sel = self.artifact, self.selection
        errors = ", ".join(f"{k} {v:.4g}" for k, v in sel.rmse_by_scheme(sel.chosen.name).items())
        return (
            f"chosen estimator {a.chosen} ({a.folds}-fold CV RMSE {errors} cores; {sel.cv.value} used), "
            f"band +{a.curve.band:.4g} cores at {a.coverage:g}"
        )


def rfc3339(t: float) -> str:
    return datetime.fromtimestamp(t, tz=timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")


def _library() -> dict[str, str]:
    from importlib.metadata import PackageNotFoundError, version

    out = {"python": platform.python_version()}
    for dist in ("ratefit", "scikit-learn", "numpy"):
        try:
            out[dist] = version(dist)
        except PackageNotFoundError:  # pragma: no cover
            out[dist] = "unknown"
    return out


def train_key_detailed(
    samples: Samples,
    *,
    key: str,
    options: TrainOptions | None = None,
    window: DataWindow | None = None,
    progress: Progress | None = None,
    **overrides: Any,
) -> TrainResult:
    """Clean ``samples``, choose an estimator by CV, and build the artifact for
    ``key``. ``overrides`` amend ``options`` (e.g. ``coverage=0.9, warmup=0``)."""
    k = str(parse_key(key))
    opts = TrainOptions.of(options, **overrides)
    t0 = time.perf_counter()
    say = (lambda m: progress(f"{k}: {m}")) if progress else None
    cleaned, report = clean(samples, throttle_threshold=opts.throttle_threshold, warmup=opts.warmup)
    if say:
        say(report.summary())
    sel = select(cleaned.rate, cleaned.cpu, opts, timestamps=cleaned.timestamp, progress=say)
    lo, hi = float(np.min(cleaned.rate)), float(np.max(cleaned.rate))
    est = sel.estimator
    curve = DemandCurve.tabulate(lambda g: est.predict(g.reshape(-1, 1)), rate_lo=lo, rate_hi=hi, band=sel.band)
    rows = [
        CVRow(
            model=s.name,
            rmse=s.rmse,
            mae=s.mae,
            p95=s.p95,
            fit_seconds=round(s.fit_seconds, 6),
            params=sel.params if s.name == sel.chosen.name else s.params,
        )
        for s in sel.scores
    ]
    if window is None:
        span = samples.time_span()
        window = DataWindow(
            source=f"csv:{samples.source}",
            start=rfc3339(span[0]) if span else None,
            end=rfc3339(span[1]) if span else None,
        )
    art = Artifact(
        key=k,
        chosen=sel.chosen.name,
        coverage=opts.coverage,
        rate_range=(lo, hi),
        curve=CurveData(**curve.to_dict()),
        samples=report.used,
        samples_total=report.total,
        dropped=dict(report.dropped),
        cv=rows,
        folds=opts.folds,
        seed=opts.seed,
        tuned=opts.tune,
        window=window,
        trained_at=rfc3339(time.time()),
        library=_library(),
    ).sealed()
    secs = time.perf_counter() - t0
    if say:
        say(f"trained in {secs:.1f} s: chosen estimator {sel.chosen.name} ({sel.cv.value} CV), "
            f"band {sel.band:.4g} cores at coverage {opts.coverage:g}")
    return TrainResult(artifact=art, report=report, selection=sel, samples=cleaned, seconds=secs)


def train_key(samples: Samples, *, key: str, options: TrainOptions | None = None, **kwargs: Any) -> Artifact:
    """Train one key and return its (sealed, unsaved) artifact; arguments as
    :func:`train_key_detailed` (window, progress, and TrainOptions overrides)."""
    return train_key_detailed(samples, key=key, options=options, **kwargs).artifact


def train_many(
    samples_by_key: Mapping[str, Samples], options: TrainOptions | None = None, **kwargs: Any
) -> dict[str, Artifact]:
    """Train every key (in sorted order) with the same options; returns artifacts by key."""
    return {k: train_key(samples_by_key[k], key=k, options=options, **kwargs) for k in sorted(samples_by_key)}


def samples_dir_files(directory: str | os.PathLike[str]) -> dict[str, Path]:
    """``{key: csv path}`` for a directory of per-key CSVs (see the module docstring)."""
    d = Path(directory)
    if not d.is_dir():
        raise InputError(f"samples directory {str(d)!r} does not exist or is not a directory")
    out: dict[str, Path] = {}
    for p in sorted(d.glob("*.csv")):
        parts = p.stem.split("__")
        if len(parts) == 3:
            out[str(parse_key("/".join(parts), field=f"file name {p.name}"))] = p
    for p in sorted(d.glob("*/*/*.csv")):
        k = f"{p.parent.parent.name}/{p.parent.name}/{p.stem}"
        out[str(parse_key(k, field=f"file {p}"))] = p
    if not out:
        raise InputError(
            f"no samples files in {str(d)!r}: expected one CSV per key named "
            "namespace__workload__container.csv (or namespace/workload/container.csv)"
        )
    return out


def load_samples_dir(directory: str | os.PathLike[str]) -> dict[str, Samples]:
    return {k: load_csv(p) for k, p in samples_dir_files(directory).items()}


def train_from_prometheus(
    client: Any,
    *,
    key: str,
    rate_query: str,
    cpu_query: str,
    throttle_query: str | None = None,
    start: float,
    end: float,
    step: float,
    source: str = "prometheus",
    step_text: str | None = None,
    options: TrainOptions | None = None,
    progress: Progress | None = None,
    **overrides: Any,
) -> TrainResult:
    """Fetch joined samples over [start, end] at ``step`` seconds and train ``key``."""
    from ratefit.models.prometheus_samples import fetch_samples

    rows = fetch_samples(
        client, rate_query=rate_query, cpu_query=cpu_query, throttle_query=throttle_query, start=start, end=end, step=step
    )
    samples = Samples.from_rows(rows, source=source)
    window = DataWindow(source=source, start=rfc3339(start), end=rfc3339(end), step=step_text or f"{step:g}s")
    return train_key_detailed(samples, key=key, options=options, window=window, progress=progress, **overrides)
