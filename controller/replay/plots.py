"""Plots and the written report of a replay (matplotlib, headless).

* ``cluster.png`` — requested CPU over time for current / fixed / ratefit against usage,
  summed over every replayed pod;
* ``workload-<ns>-<kind>-<name>.png`` — the same per workload;
* ``nodes.png`` — nodes of --node-cpu needed at each pass, per strategy;
* ``autoscaled-<ns>-<kind>-<name>.png`` — for a workload under a CPU-utilisation
  autoscaler: reserved CPU (simulated replicas × request) and replicas over time for
  current / fixed / ratefit / suggested (``controller.replay.replicas``);
* ``requests-<ns>-<name>-<container>.png`` — per container its ratefit request steps over
  the usage of each of its pods (and the current and fixed levels);
* ``summary.md`` and ``replay.json`` — the figures as printed.
"""

from __future__ import annotations

import json
import re
from collections.abc import Iterable
from pathlib import Path

import numpy as np

from ratefit.controller.replay.outcome import render, step_values, to_json
from ratefit.controller.replay.series import MINUTE

__all__ = ["write_report", "minute_series"]


def _safe(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.-]+", "-", text).strip("-")


def minute_series(result, keys: Iterable[tuple[str, str]]) -> dict[str, np.ndarray]:
    """Per minute, summed over the pods of the given (workload, container) keys: usage and
    the three strategies' requests (cores)."""
    n = len(result.minutes)
    out = {s: np.zeros(n) for s in ("usage", "current", "fixed", "ratefit")}
    for key in keys:
        current, fixed_m = result.static[key]
        steps = result.sim.steps.get(key, [(float(result.sim.pass_times[0]), current)])
        rf = step_values(steps, result.minutes - MINUTE) / 1000.0
        for u in result.usage.get(key, []):
            if not len(u.cores):
                continue
            sl = slice(u.first, u.stop)
            out["usage"][sl] += u.cores
            out["current"][sl] += (current or 0) / 1000.0
            out["fixed"][sl] += fixed_m / 1000.0
            out["ratefit"][sl] += rf[sl]
    return out


def _times(seconds: np.ndarray):
    return (np.asarray(seconds, dtype="float64") * 1000).astype("datetime64[ms]")


def _strategy_plot(plt, path: Path, result, keys, title: str) -> None:
    s = minute_series(result, keys)
    t = _times(result.minutes)
    fig, ax = plt.subplots(figsize=(11, 4.2))
    ax.plot(t, s["usage"], color="0.55", lw=0.6, label="usage")
    ax.plot(t, s["current"], lw=1.4, label="current")
    ax.plot(t, s["fixed"], lw=1.4, label="fixed (p95 of usage)")
    ax.plot(t, s["ratefit"], lw=1.4, label="ratefit")
    ax.set_ylabel("CPU cores")
    ax.set_title(title)
    ax.set_ylim(bottom=0)
    ax.legend(loc="upper left", fontsize=8)
    fig.autofmt_xdate()
    fig.tight_layout()
    fig.savefig(path, dpi=90)
    plt.close(fig)


def _autoscaled_plot(plt, path: Path, a, t) -> None:
    """Reserved CPU (replicas × request) and replicas over time per strategy, for one
    workload under a CPU-utilisation autoscaler."""
    fig, (top, bottom) = plt.subplots(2, 1, figsize=(11, 5.6), sharex=True, height_ratios=(2, 1))
    for s in a.replicas:
        top.step(t, a.reserved(s), where="post", lw=1.3, label=f"{s}: {a.reserved_cpu_hours(s):.1f} CPU-h")
        bottom.step(t, a.replicas[s], where="post", lw=1.1, label=s)
    top.set_ylabel("reserved CPU cores")
    top.set_title(f"{a.workload} under autoscaler {a.hpa} (CPU {a.utilization:g} %): replicas x request")
    top.set_ylim(bottom=0)
    top.legend(loc="upper left", fontsize=8)
    bottom.set_ylabel("replicas")
    bottom.set_ylim(0, a.max_replicas + 0.5)
    bottom.legend(loc="upper left", fontsize=8, ncol=4)
    fig.autofmt_xdate()
    fig.tight_layout()
    fig.savefig(path, dpi=90)
    plt.close(fig)


def write_report(result, out: Path) -> list[Path]:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    out.mkdir(parents=True, exist_ok=True)
    written: list[Path] = []
    o = result.outcome
    keys = list(result.static)
    p = out / "cluster.png"
    _strategy_plot(plt, p, result, keys, "Requested CPU vs usage, all replayed pods")
    written.append(p)
    for w in o.workloads():
        wk = [k for k in keys if k[0] == w]
        p = out / f"workload-{_safe(w)}.png"
        _strategy_plot(plt, p, result, wk, f"{w}: requested CPU vs usage")
        written.append(p)
    fig, ax = plt.subplots(figsize=(11, 3.5))
    t = _times(result.sim.pass_times)
    for s in ("current", "fixed", "ratefit"):
        ax.step(t, o.nodes[s], where="post", label=s)
    ax.set_ylabel(f"nodes of {o.node_cpu:g} CPU")
    ax.set_title("Nodes needed to hold every pod's CPU requests (first-fit decreasing)")
    ax.legend(fontsize=8)
    ax.set_ylim(bottom=0)
    fig.autofmt_xdate()
    fig.tight_layout()
    p = out / "nodes.png"
    fig.savefig(p, dpi=90)
    plt.close(fig)
    written.append(p)
    for a in o.autoscaled:
        p = out / f"autoscaled-{_safe(a.workload)}.png"
        _autoscaled_plot(plt, p, a, t)
        written.append(p)
    tm = _times(result.minutes)
    for (w, c) in keys:
        current, fixed_m = result.static[(w, c)]
        steps = result.sim.steps.get((w, c), [(float(result.sim.pass_times[0]), current)])
        fig, ax = plt.subplots(figsize=(11, 3.8))
        for u in result.usage.get((w, c), []):
            if len(u.cores):
                ax.plot(tm[u.first:u.stop], u.cores, lw=0.5, alpha=0.6)
        rf = step_values(steps, result.minutes - MINUTE) / 1000.0
        ax.step(tm, rf, where="post", color="black", lw=1.5, label="ratefit request")
        ax.axhline((current or 0) / 1000.0, color="tab:blue", ls="--", lw=1, label="current")
        ax.axhline(fixed_m / 1000.0, color="tab:orange", ls=":", lw=1.2, label="fixed")
        ax.set_ylabel("CPU cores")
        ax.set_title(f"{w} / {c}: request steps over each pod's usage")
        ax.set_ylim(bottom=0)
        ax.legend(loc="upper left", fontsize=8)
        fig.autofmt_xdate()
        fig.tight_layout()
        p = out / f"requests-{_safe(w)}-{_safe(c)}.png"
        fig.savefig(p, dpi=90)
        plt.close(fig)
        written.append(p)
    md = out / "summary.md"
    md.write_text("# ratefit replay\n\n" + render(o, "markdown") + "\n" + "".join(
        f"![{x.stem}]({x.name})\n" for x in written if x.suffix == ".png"), encoding="utf-8")
    js = out / "replay.json"
    js.write_text(json.dumps(to_json(o), indent=2) + "\n", encoding="utf-8")
    return [*written, md, js]
