"""Training reports: one Markdown page and one PNG plot per key.

``write_report(artifact, out_dir, *, samples=None, estimators=None)`` writes
``<out>/<namespace>__<workload>__<container>.md`` and ``….png`` and returns both
paths. The page holds what a reviewer needs to trust (or not) the curve: the
data window, what cleaning dropped and why, the cross-validation table (RMSE,
MAE, p95 absolute error, mean fit time per fold), the chosen model, the band and
its coverage, and the plot: the clean samples, every candidate's curve (when the
fitted estimators are given), the chosen curve with its upper band, and the fixed
allocation baseline (the 0.95 quantile of observed CPU) as a horizontal line.

matplotlib runs on the non-interactive Agg backend (no display needed).
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np

from ratefit.models.samples import Samples
from ratefit.models.store import Artifact

__all__ = ["write_report", "render_markdown", "plot_curve", "report_stem"]

#: most samples drawn in the scatter (a random, seeded subset beyond that)
MAX_SCATTER = 5000
#: candidate line colours (the chosen curve is red, C3, and drawn thick)
_CANDIDATE_COLORS = ("C0", "C1", "C2", "C4", "C5", "C6", "C8", "C9", "C7")


def report_stem(key: str) -> str:
    return key.replace("/", "__")


def _fmt(v: float) -> str:
    return f"{v:.4g}"


def render_markdown(artifact: Artifact, *, plot_name: str | None) -> str:
    a = artifact
    lines = [
        f"# Demand curve `{a.key}`",
        "",
        f"- chosen model: **{a.chosen}** (lowest 5-fold CV RMSE; ties within 2% go to the simpler model)"
        if a.folds == 5
        else f"- chosen model: **{a.chosen}** (lowest {a.folds}-fold CV RMSE; ties within 2% go to the simpler model)",
        f"- trained rate range: {_fmt(a.rate_range[0])} – {_fmt(a.rate_range[1])} req/s per pod "
        "(beyond it lookups are extrapolated and flagged)",
        f"- upper band: +{_fmt(a.curve.band)} cores (one-sided split-conformal, coverage {a.coverage:g})",
        f"- demand at the range ends: {_fmt(a.curve.cpu[0])} → {_fmt(a.curve.cpu[-1])} cores",
        f"- samples: {a.samples} used of {a.samples_total}; dropped: "
        + (", ".join(f"{n} {r}" for r, n in a.dropped.items() if n) or "none"),
        f"- data: {a.window.source}"
        + (f", {a.window.start} … {a.window.end}" if a.window.start else "")
        + (f", step {a.window.step}" if a.window.step else ""),
        f"- folds {a.folds}, seed {a.seed}, tuned: {'yes (nested grid search)' if a.tuned else 'no'}; "
        f"trained {a.trained_at}; artifact version {a.version}",
        "",
        "## Cross-validation (cores)",
        "",
        "| model | RMSE | MAE | p95 abs error | fit s / fold | |",
        "|---|---:|---:|---:|---:|---|",
    ]
    for row in sorted(a.cv, key=lambda r: r.rmse):
        mark = "chosen" if row.model == a.chosen else ("baseline" if row.model == "fixed" else "")
        lines.append(
            f"| {row.model} | {_fmt(row.rmse)} | {_fmt(row.mae)} | {_fmt(row.p95)} | {row.fit_seconds:.3f} | {mark} |"
        )
    fixed = next((r for r in a.cv if r.model == "fixed"), None)
    chosen = next((r for r in a.cv if r.model == a.chosen), None)
    if fixed and chosen and fixed.rmse > 0:
        lines += ["", f"The chosen model's RMSE is {100 * (1 - chosen.rmse / fixed.rmse):.0f}% below the fixed allocation's."]
    if plot_name:
        lines += ["", f"![demand curve of {a.key}]({plot_name})"]
    lines += [
        "",
        "Errors are in cores, measured on held-out folds. The band is added to the curve to give the "
        "upper demand the sizing uses.",
        "",
    ]
    return "\n".join(lines)


def plot_curve(
    artifact: Artifact,
    path: str | os.PathLike[str],
    *,
    samples: Samples | None = None,
    estimators: Mapping[str, Any] | None = None,
) -> Path:
    """Draw the PNG (see the module docstring) and return its path."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    a = artifact
    curve = a.demand_curve()
    grid = curve.grid
    fig, ax = plt.subplots(figsize=(8, 5), dpi=110)
    try:
        if samples is not None and len(samples):
            pick = np.arange(len(samples))
            if pick.size > MAX_SCATTER:
                pick = np.random.default_rng(0).choice(pick.size, MAX_SCATTER, replace=False)
            ax.scatter(samples.rate[pick], samples.cpu[pick], s=4, alpha=0.25, color="0.45", label="samples (clean)")
        others = [n for n in (estimators or {}) if n not in (a.chosen, "fixed")]
        for name, color in zip(others, _CANDIDATE_COLORS):
            est = estimators[name]  # type: ignore[index]
            ax.plot(grid, est.predict(grid.reshape(-1, 1)), lw=1, alpha=0.8, color=color, label=name)
        ax.plot(grid, curve.cpu, color="C3", lw=2.5, label=f"chosen: {a.chosen}")
        ax.fill_between(grid, curve.cpu, curve.cpu + curve.band, color="C3", alpha=0.15,
                        label=f"upper band (coverage {a.coverage:g})")
        ax.plot(grid, curve.cpu + curve.band, color="C3", lw=1, ls="--")
        fixed = estimators.get("fixed") if estimators else None
        if fixed is not None:
            level = float(fixed.predict(np.zeros((1, 1)))[0])
            ax.axhline(level, color="k", ls=":", lw=1.5, label=f"fixed allocation ({level:.3g} cores)")
        ax.set_xlabel("request rate per pod (req/s)")
        ax.set_ylabel("CPU usage (cores)")
        ax.set_title(f"{a.key} — demand curve")
        ax.set_ylim(bottom=0)
        ax.grid(True, alpha=0.3)
        ax.legend(loc="upper left", fontsize=8)
        fig.tight_layout()
        out = Path(path)
        fig.savefig(out)
    finally:
        plt.close(fig)
    return out


def write_report(
    artifact: Artifact,
    out_dir: str | os.PathLike[str],
    *,
    samples: Samples | None = None,
    estimators: Mapping[str, Any] | None = None,
) -> tuple[Path, Path]:
    """Write the Markdown page and the PNG for ``artifact``; returns (md, png)."""
    d = Path(out_dir)
    d.mkdir(parents=True, exist_ok=True)
    stem = report_stem(artifact.key)
    png = plot_curve(artifact, d / f"{stem}.png", samples=samples, estimators=estimators)
    md = d / f"{stem}.md"
    md.write_text(render_markdown(artifact, plot_name=png.name), encoding="utf-8")
    return md, png


def fit_all_for_report(samples: Samples, *, seed: int = 0) -> dict[str, Any]:
    """Every candidate fitted on all the clean samples (default parameters), for the plot."""
    from ratefit.models.candidates import get_candidates

    from threadpoolctl import threadpool_limits

    X = samples.rate.reshape(-1, 1)
    with threadpool_limits(limits=1):
        return {c.name: c.build(seed).fit(X, samples.cpu) for c in get_candidates()}
