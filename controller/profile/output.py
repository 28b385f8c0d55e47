"""What a profile leaves behind: the samples CSV, the JSON answer, a step table, a plot.

The CSV uses the training format of ``ratefit.models.samples`` (columns ``rate,cpu``
plus ``pod``; ``throttled`` when the cgroup reports CFS periods; ``timestamp`` on
request), one row per sample window, so ``ratefit train --samples FILE.csv`` learns
from it directly. Extra columns ``target_rate`` and ``step`` are ignored by the loader.
Timestamps are off by default: ``train`` drops the first ``--warmup`` (5m) of every
pod's samples, and a profile's warm-up is already discarded per step.

The JSON keeps the field names the issue fixes: ``steps[]`` with ``target_rate``,
``achieved_rate``, ``cpu`` (cores), ``p50_ms``, ``p99_ms``, ``error_share`` (and more),
then ``capacity`` (req/s per pod or null), ``slope`` (cores per req/s),
``intercept`` (cores), ``r2``.
"""

from __future__ import annotations

import csv
import math
import os
from pathlib import Path
from typing import Any

from ratefit.controller.profile.steps import Profile, StepResult

__all__ = [
    "profile_dict",
    "step_dict",
    "read_capacity",
    "write_samples_csv",
    "step_table",
    "step_markdown",
    "write_plot",
]


def _num(v: float, nd: int = 6) -> float | None:
    return round(float(v), nd) if v is not None and math.isfinite(v) else None


def step_dict(s: StepResult) -> dict[str, Any]:
    return {
        "target_rate": s.target_rate,
        "achieved_rate": _num(s.achieved_rate, 3),
        "sent_rate": _num(s.sent_rate, 3),
        "dispatch_rate": _num(s.dispatch_rate, 3),
        "cpu": _num(s.cpu, 5),
        "p50_ms": _num(s.p50_ms, 3),
        "p95_ms": _num(s.p95_ms, 3),
        "p99_ms": _num(s.p99_ms, 3),
        "error_share": _num(s.error_share, 5),
        "requests": s.requests,
        "errors": s.errors,
        "within_capacity": s.ok,
        "failed": list(s.failed),
    }


def profile_dict(p: Profile, *, url: str, cpu_from: str, samples_file: str | None) -> dict[str, Any]:
    f = p.fit
    return {
        "steps": [step_dict(s) for s in p.steps],
        "capacity": p.capacity,
        "cpu_at_capacity": next((_num(s.cpu, 5) for s in p.steps if s.target_rate == p.capacity), None),
        "slope": _num(f.slope, 8) if f else None,
        "intercept": _num(f.intercept, 6) if f else None,
        "r2": _num(f.r2, 5) if f else None,
        "fit_points": f.n if f else 0,
        "stopped": p.stopped,
        "slo_p99_ms": p.criteria.slo_p99_ms,
        "max_errors": p.criteria.max_errors,
        "url": url,
        "cpu_from": cpu_from,
        "samples_file": samples_file,
    }


def read_capacity(path: str | os.PathLike[str]) -> float | None:
    """The per-pod capacity (req/s) from a file holding the JSON that
    ``ratefit profile --output json`` printed; None when the profile found no knee.
    InputError naming the file when it is not such a JSON document."""
    import json

    from ratefit.models.errors import InputError

    name = os.fspath(path)
    try:
        doc = json.loads(Path(name).read_text(encoding="utf-8"))
    except OSError as exc:
        raise InputError(f"{name}: cannot read the profile ({exc.strerror or exc})") from None
    except (ValueError, UnicodeDecodeError) as exc:
        raise InputError(f"{name}: not JSON ({exc}); save the output of ratefit profile --output json") from None
    if not isinstance(doc, dict) or "capacity" not in doc or "steps" not in doc:
        raise InputError(f"{name}: no 'capacity' and 'steps' fields; is this the output of ratefit profile --output json?")
    cap = doc["capacity"]
    if cap is None:
        return None
    if isinstance(cap, bool) or not isinstance(cap, (int, float)) or not math.isfinite(cap) or cap <= 0:
        raise InputError(f"{name}: capacity {cap!r} must be a positive number of req/s or null")
    return float(cap)


def write_samples_csv(
    p: Profile, path: str | os.PathLike[str], *, pod: str = "profile", timestamps: bool = False
) -> int:
    """Write one row per sample window (atomically); returns the number of rows."""
    throttled = any(math.isfinite(x.throttled) for s in p.steps for x in s.samples)
    cols = ["rate", "cpu"] + (["timestamp"] if timestamps else []) + ["pod"]
    cols += (["throttled"] if throttled else []) + ["target_rate", "step"]
    target = Path(path)
    tmp = target.with_name(f".{target.name}.tmp")
    n = 0
    with open(tmp, "w", newline="", encoding="utf-8") as fh:
        w = csv.writer(fh)
        w.writerow(cols)
        for i, s in enumerate(p.steps, start=1):
            for x in s.samples:
                if not (math.isfinite(x.rate) and math.isfinite(x.cpu)):
                    continue
                row: list[Any] = [f"{x.rate:.6g}", f"{x.cpu:.6g}"]
                if timestamps:
                    row.append(f"{x.wall:.3f}")
                row.append(pod)
                if throttled:
                    row.append(f"{x.throttled:.4g}" if math.isfinite(x.throttled) else "")
                row += [f"{s.target_rate:g}", i]
                w.writerow(row)
                n += 1
    os.replace(tmp, target)
    return n


def _cell(v: float | None, fmt: str) -> str:
    return "-" if v is None or not math.isfinite(v) else format(v, fmt)


_HEAD = ("target req/s", "achieved req/s", "cpu cores", "p50 ms", "p95 ms", "p99 ms", "errors %", "verdict")


def _rows(p: Profile) -> list[tuple[str, ...]]:
    return [
        (
            f"{s.target_rate:g}",
            _cell(s.achieved_rate, ".4g"),
            _cell(s.cpu, ".4g"),
            _cell(s.p50_ms, ".3g"),
            _cell(s.p95_ms, ".3g"),
            _cell(s.p99_ms, ".3g"),
            _cell(100 * s.error_share, ".3g"),
            "ok" if s.ok else "client fell behind" if s.client_limited else "beyond capacity",
        )
        for s in p.steps
    ]


def _summary(p: Profile) -> list[str]:
    out = [f"capacity: {p.capacity:g} req/s per pod" if p.capacity is not None else "capacity: not found"]
    if p.fit:
        out.append(
            f"fit: cpu = {p.fit.intercept:.4g} + {p.fit.slope:.4g} x rate cores "
            f"(+{p.fit.marginal_cores_per_100_rps:.4g} cores per extra 100 req/s), R2 {p.fit.r2:.4f} over {p.fit.n} steps"
        )
    out.append(p.stopped)
    return out


def step_table(p: Profile) -> str:
    rows = [_HEAD, *_rows(p)]
    widths = [max(len(r[i]) for r in rows) for i in range(len(_HEAD))]
    lines = ["  ".join(c.rjust(w) if i < len(_HEAD) - 1 else c for i, (c, w) in enumerate(zip(r, widths))) for r in rows]
    return "\n".join(lines + [""] + _summary(p))


def step_markdown(p: Profile) -> str:
    lines = ["| " + " | ".join(_HEAD) + " |", "|" + "---:|" * (len(_HEAD) - 1) + "---|"]
    lines += ["| " + " | ".join(r) + " |" for r in _rows(p)]
    return "\n".join(lines + [""] + [f"- {s}" for s in _summary(p)])


def write_plot(p: Profile, directory: str | os.PathLike[str], *, title: str) -> Path:
    """``profile.png`` in ``directory``: CPU (with the fitted line) and latency vs achieved rate."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    d = Path(directory)
    d.mkdir(parents=True, exist_ok=True)
    fig, (ax1, ax2) = plt.subplots(2, 1, figsize=(7, 7), sharex=True)
    x = [s.achieved_rate for s in p.steps]
    ax1.plot(x, [s.cpu for s in p.steps], "o", label="measured (per step)")
    xs = [x_.rate for s in p.steps for x_ in s.samples]
    ax1.plot(xs, [x_.cpu for s in p.steps for x_ in s.samples], ".", alpha=0.3, label="samples")
    if p.fit:
        lo, hi = min(x), max(x)
        ax1.plot([lo, hi], [p.fit.at(lo), p.fit.at(hi)], "-", label=f"fit, R2 {p.fit.r2:.3f}")
    ax1.set_ylabel("CPU (cores)")
    ax1.legend(loc="upper left")
    for q, name in ((50, "p50_ms"), (95, "p95_ms"), (99, "p99_ms")):
        ax2.plot(x, [getattr(s, name) for s in p.steps], "o-", label=f"p{q}")
    if p.criteria.slo_p99_ms is not None:
        ax2.axhline(p.criteria.slo_p99_ms, color="red", linestyle="--", label="SLO p99")
    if p.capacity is not None:
        for ax in (ax1, ax2):
            ax.axvline(p.capacity, color="grey", linestyle=":", label="capacity" if ax is ax2 else None)
    ax2.set_yscale("log")
    ax2.set_ylabel("latency (ms)")
    ax2.set_xlabel("achieved rate (req/s)")
    ax2.legend(loc="upper left")
    fig.suptitle(title)
    fig.tight_layout()
    out = d / "profile.png"
    fig.savefig(out, dpi=100)
    plt.close(fig)
    (d / "profile.md").write_text(f"# Profile of {title}\n\n{step_markdown(p)}\n\n![profile](profile.png)\n")
    return out
