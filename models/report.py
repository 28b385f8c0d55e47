"""Training reports: one Markdown page and one PNG plot per key (per model).

``write_report(artifact, out_dir, *, samples=None, estimators=None, selection=None)``
writes ``<out>/<namespace>__<workload>__<container>.md`` and ``….png`` and returns
both paths; ``write_train_report(result, out_dir)`` does the same from a
``models.train.TrainResult`` with everything filled in. The page holds what a
reviewer needs to trust (or not) the curve: the data window, what cleaning dropped
and why, the cross-validation scheme used (blocked in time or shuffled), the
cross-validation table per estimator (RMSE, MAE, p95 absolute error, mean fit time
per fold), the chosen estimator, the band and its coverage, and — when the samples
had timestamps — the chosen estimator's and the baseline's errors under *both*
schemes side by side, with the band each would give, so a person sees how much
shuffled folds flatter. The plot: the clean samples, every candidate's curve (when
the fitted estimators are given), the chosen curve with its upper band, the fixed
allocation baseline (the 0.95 quantile of observed CPU) as a horizontal line, and
(with the comparison) a panel of blocked vs shuffled RMSE.

matplotlib runs on the non-interactive Agg backend (no display needed).
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from ratefit.models.samples import Samples
from ratefit.models.store import Artifact

if TYPE_CHECKING:  # pragma: no cover - annotations only; select pulls in scikit-learn
    from ratefit.models.select import Selection
    from ratefit.models.train import TrainResult

__all__ = ["write_report", "write_train_report", "render_markdown", "plot_curve", "report_stem", "fit_all_for_report"]

#: most samples drawn in the scatter (a random, seeded subset beyond that)
MAX_SCATTER = 5000
#: candidate line colours (the chosen curve is red, C3, and drawn thick)
_CANDIDATE_COLORS = ("C0", "C1", "C2", "C4", "C5", "C6", "C8", "C9", "C7")


def report_stem(key: str) -> str:
    return key.replace("/", "__")


def _fmt(v: float) -> str:
    return f"{v:.4g}"


def _cv_lines(a: Artifact, selection: Selection | None) -> list[str]:
    """The scheme line for the summary list."""
    if selection is None:
        return ["- cross-validation scheme: not given to this report (see the training output)"]
    if selection.cv.value == "blocked":
        gap = f", gap {selection.cv_gap:g} s" if selection.cv_gap else ""
        text = f"blocked in time ({a.folds} contiguous blocks{gap})"
    else:
        text = f"shuffled ({a.folds} random folds, seed {a.seed})"
    return [f"- cross-validation: **{text}**; the band comes from its held-out errors"]


def _comparison_lines(a: Artifact, selection: Selection | None) -> list[str]:
    """Blocked and shuffled errors side by side (chosen estimator and baseline)."""
    if selection is None:
        return []
    comp = selection.comparison
    if comp is None:
        why = ("the samples have no timestamps, so there is no time order to block"
               if selection.cv.value == "shuffled" else "the comparison was not computed")
        return ["", "## Blocked vs shuffled", "", f"Not shown: {why}."]
    blocked_first = selection.cv.value == "blocked"
    used, other = selection.cv.value, comp.scheme.value
    cols = ("blocked", "shuffled")
    lines = [
        "",
        "## Blocked vs shuffled (cores)",
        "",
        "Shuffled folds put a held-out minute's neighbours into training; on a time series that "
        "makes the error, and the band built from it, look smaller than on a later stretch of time.",
        "",
        "| estimator | RMSE blocked | RMSE shuffled | shuffled / blocked |",
        "|---|---:|---:|---:|",
    ]
    for s_used in selection.scores:
        s_other = comp.score(s_used.name)
        if s_other is None:
            continue
        by = {used: s_used.rmse, other: s_other.rmse}
        ratio = by["shuffled"] / by["blocked"] if by["blocked"] > 0 else float("nan")
        lines.append(f"| {s_used.name} | {_fmt(by[cols[0]])} | {_fmt(by[cols[1]])} | {ratio:.2f} |")
    bands = {used: selection.band, other: comp.band}
    lines += [
        "",
        f"Upper band of the chosen estimator at coverage {a.coverage:g}: +{_fmt(bands['blocked'])} cores "
        f"from blocked folds, +{_fmt(bands['shuffled'])} cores from shuffled folds "
        f"({'blocked' if blocked_first else 'shuffled'} used).",
    ]
    return lines


def render_markdown(artifact: Artifact, *, plot_name: str | None, selection: Selection | None = None) -> str:
    a = artifact
    lines = [
        f"# Demand curve `{a.key}`",
        "",
        f"- chosen estimator: **{a.chosen}** (lowest {a.folds}-fold CV RMSE; ties within 2% go to the "
        "simpler estimator)",
        *_cv_lines(a, selection),
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
        f"trained {a.trained_at}; model version {a.version}",
        "",
        "## Cross-validation (cores)"
        + (f" — {selection.cv.value}" if selection is not None else ""),
        "",
        "| estimator | RMSE | MAE | p95 abs error | fit s / fold | |",
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
        lines += ["", f"The chosen estimator's RMSE is {100 * (1 - chosen.rmse / fixed.rmse):.0f}% below the "
                  "fixed allocation's."]
    lines += _comparison_lines(a, selection)
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
    selection: Selection | None = None,
) -> Path:
    """Draw the PNG (see the module docstring) and return its path."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    a = artifact
    curve = a.demand_curve()
    grid = curve.grid
    comp = selection.comparison if selection is not None else None
    if comp is not None:
        fig, (ax, bx) = plt.subplots(1, 2, figsize=(11, 5), dpi=110, gridspec_kw={"width_ratios": [3, 1.2]})
    else:
        fig, ax = plt.subplots(figsize=(8, 5), dpi=110)
        bx = None
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
        ax.plot(grid, curve.cpu, color="C3", lw=2.5, label=f"chosen estimator: {a.chosen}")
        ax.fill_between(grid, curve.cpu, curve.cpu + curve.band, color="C3", alpha=0.15,
                        label=f"upper band (coverage {a.coverage:g})")
        ax.plot(grid, curve.cpu + curve.band, color="C3", lw=1, ls="--")
        fixed = estimators.get("fixed") if estimators else None
        if fixed is not None:
            level = float(fixed.predict(np.zeros((1, 1)))[0])
            ax.axhline(level, color="k", ls=":", lw=1.5, label=f"fixed allocation ({level:.3g} cores)")
        ax.set_xlabel("request rate per pod (req/s)")
        ax.set_ylabel("CPU usage (cores)")
        scheme = f" ({selection.cv.value} CV)" if selection is not None else ""
        ax.set_title(f"{a.key} — demand curve{scheme}")
        ax.set_ylim(bottom=0)
        ax.grid(True, alpha=0.3)
        ax.legend(loc="upper left", fontsize=8)
        if bx is not None and comp is not None and selection is not None:
            _plot_comparison(bx, selection)
        fig.tight_layout()
        out = Path(path)
        fig.savefig(out)
    finally:
        plt.close(fig)
    return out


def _plot_comparison(bx: Any, selection: Selection) -> None:
    """Grouped bars: RMSE under blocked and shuffled folds, per compared estimator."""
    comp = selection.comparison
    assert comp is not None
    names = [s.name for s in selection.scores if comp.score(s.name) is not None]
    by = {n: selection.rmse_by_scheme(n) for n in names}
    x = np.arange(len(names))
    w = 0.38
    for off, scheme, color in ((-w / 2, "blocked", "C0"), (w / 2, "shuffled", "C1")):
        vals = [by[n][scheme] for n in names]
        bars = bx.bar(x + off, vals, w, color=color, label=scheme + (" (used)" if selection.cv.value == scheme else ""))
        bx.bar_label(bars, fmt="%.3g", fontsize=7)
    bx.set_xticks(x, names)
    bx.set_ylabel("CV RMSE (cores)")
    bx.set_title("blocked vs shuffled folds", fontsize=10)
    bx.grid(True, axis="y", alpha=0.3)
    bx.legend(fontsize=8)


def write_report(
    artifact: Artifact,
    out_dir: str | os.PathLike[str],
    *,
    samples: Samples | None = None,
    estimators: Mapping[str, Any] | None = None,
    selection: Selection | None = None,
) -> tuple[Path, Path]:
    """Write the Markdown page and the PNG for ``artifact``; returns (md, png)."""
    d = Path(out_dir)
    d.mkdir(parents=True, exist_ok=True)
    stem = report_stem(artifact.key)
    png = plot_curve(artifact, d / f"{stem}.png", samples=samples, estimators=estimators, selection=selection)
    md = d / f"{stem}.md"
    md.write_text(render_markdown(artifact, plot_name=png.name, selection=selection), encoding="utf-8")
    return md, png


def write_train_report(result: TrainResult, out_dir: str | os.PathLike[str], *, seed: int = 0) -> tuple[Path, Path]:
    """The report of one training run: every candidate drawn (default parameters),
    the chosen one as fitted, the scheme used and the blocked/shuffled comparison."""
    ests = fit_all_for_report(result.samples, seed=seed)
    ests[result.artifact.chosen] = result.selection.estimator
    return write_report(result.artifact, out_dir, samples=result.samples, estimators=ests,
                        selection=result.selection)


def fit_all_for_report(samples: Samples, *, seed: int = 0) -> dict[str, Any]:
    """Every candidate fitted on all the clean samples (default parameters), for the plot."""
    from threadpoolctl import threadpool_limits

    from ratefit.models.candidates import get_candidates

    X = samples.rate.reshape(-1, 1)
    with threadpool_limits(limits=1):
        return {c.name: c.build(seed).fit(X, samples.cpu) for c in get_candidates()}
