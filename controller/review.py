"""The review: one row per container of every SizingPolicy, as a table, JSON or Markdown.

This is what an engineer reads before letting anything change (``ratefit plan``, the
demo, the log of ``ratefit run``). Each row carries the fixed columns

    workload, container, current, proposed, demand, upper, rate, verdict, why

(JSON: a list of objects with exactly these keys plus the extra keys listed in
:data:`EXTRA_KEYS`). CPU values are Kubernetes quantities in canonical millicores
(``"250m"``); ``rate`` is requests per second per pod (the policy's percentile);
``why`` is the reason(s) for the verdict, comma-separated, empty when there is none.
Rows of a policy with ``resizeBy: InPlace`` say in ``note`` that resizing running pods
leaves the workload's template unchanged, so new pods start at the template value
(Kubernetes docs, "Resize CPU and Memory Resources assigned to Containers").
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any

__all__ = ["ReviewRow", "COLUMNS", "EXTRA_KEYS", "render", "to_json", "to_markdown", "to_table", "FORMATS"]

#: the columns every output has, in this order
COLUMNS = ("workload", "container", "current", "proposed", "demand", "upper", "rate", "verdict", "why")
#: further keys of the JSON objects
EXTRA_KEYS = (
    "namespace",
    "policy",
    "kind",
    "mode",
    "method",
    "current_m",
    "proposed_m",
    "demand_m",
    "upper_m",
    "limit",
    "proposed_limit",
    "extrapolated",
    "note",
    "cgroup",
    "cores_per_100_rps",
    "cores_per_100_rps_suggested",
)
FORMATS = ("table", "json", "markdown")

IN_PLACE_NOTE = (
    "in-place: running pods are resized; the workload template is unchanged, "
    "so new pods start at the template value"
)


def fmt_m(millicores: int | None) -> str:
    """Millicores as a canonical Kubernetes CPU quantity (``250m``), ``-`` when unknown."""
    return "-" if millicores is None else f"{int(millicores)}m"


@dataclass(frozen=True)
class ReviewRow:
    """One container's line of the review (plain values; built by the reconcile pass)."""

    namespace: str
    policy: str
    kind: str
    workload: str
    container: str
    verdict: str
    why: tuple[str, ...] = ()
    current_m: int | None = None
    proposed_m: int | None = None
    demand_m: int | None = None
    upper_m: int | None = None
    rate: float | None = None
    limit_m: int | None = None
    proposed_limit_m: int | None = None
    mode: str = "DryRun"
    method: str = "Rollout"
    extrapolated: bool = False
    note: str = ""
    #: what the kernel gets for the proposed request (controller/cgroup figures), if known
    cgroup: dict[str, Any] | None = field(default=None, compare=False)
    #: reserved cores per 100 req/s of the workload's load, now and at the suggested size
    cores_per_100: float | None = None
    cores_per_100_suggested: float | None = None

    @property
    def why_text(self) -> str:
        return ",".join(self.why)

    def as_dict(self) -> dict[str, Any]:
        """The JSON object of this row: the fixed :data:`COLUMNS` then :data:`EXTRA_KEYS`."""
        note = self.note
        if self.method == "InPlace" and IN_PLACE_NOTE not in note:
            note = f"{note}; {IN_PLACE_NOTE}" if note else IN_PLACE_NOTE
        return {
            "workload": f"{self.kind}/{self.workload}",
            "container": self.container,
            "current": None if self.current_m is None else fmt_m(self.current_m),
            "proposed": None if self.proposed_m is None else fmt_m(self.proposed_m),
            "demand": None if self.demand_m is None else fmt_m(self.demand_m),
            "upper": None if self.upper_m is None else fmt_m(self.upper_m),
            "rate": None if self.rate is None else round(float(self.rate), 4),
            "verdict": self.verdict,
            "why": self.why_text,
            "namespace": self.namespace,
            "policy": self.policy,
            "kind": self.kind,
            "mode": self.mode,
            "method": self.method,
            "current_m": self.current_m,
            "proposed_m": self.proposed_m,
            "demand_m": self.demand_m,
            "upper_m": self.upper_m,
            "limit": None if self.limit_m is None else fmt_m(self.limit_m),
            "proposed_limit": None if self.proposed_limit_m is None else fmt_m(self.proposed_limit_m),
            "extrapolated": bool(self.extrapolated),
            "note": note,
            "cgroup": self.cgroup,
            "cores_per_100_rps": None if self.cores_per_100 is None else round(self.cores_per_100, 4),
            "cores_per_100_rps_suggested": (
                None if self.cores_per_100_suggested is None else round(self.cores_per_100_suggested, 4)),
        }


def _cells(row: ReviewRow) -> list[str]:
    d = row.as_dict()
    return [
        f"{row.namespace}/{d['workload']}",
        row.container,
        d["current"] or "-",
        d["proposed"] or "-",
        d["demand"] or "-",
        d["upper"] or "-",
        "-" if row.rate is None else f"{row.rate:.3g}",
        row.verdict,
        (row.why_text or "-") + (" (in-place: new pods start at template value)" if row.method == "InPlace" else ""),
    ]


def _sorted(rows: Iterable[ReviewRow]) -> list[ReviewRow]:
    return sorted(rows, key=lambda r: (r.namespace, r.kind, r.workload, r.container))


def to_table(rows: Sequence[ReviewRow]) -> str:
    """A fixed-width text table for a terminal."""
    header = list(COLUMNS)
    body = [_cells(r) for r in _sorted(rows)]
    widths = [max(len(h), *(len(b[i]) for b in body)) if body else len(h) for i, h in enumerate(header)]
    right = {2, 3, 4, 5, 6}  # numbers align right

    def line(cells: list[str]) -> str:
        return "  ".join(c.rjust(w) if i in right else c.ljust(w) for i, (c, w) in enumerate(zip(cells, widths))).rstrip()

    out = [line([h.upper() for h in header])]
    out += [line(b) for b in body]
    out.append(summary(rows))
    return "\n".join(out) + "\n"


def to_markdown(rows: Sequence[ReviewRow], *, title: str | None = None) -> str:
    """A GitHub-flavoured Markdown table (pipes escaped)."""
    out = []
    if title:
        out += [f"# {title}", ""]
    out.append("| " + " | ".join(COLUMNS) + " |")
    out.append("|" + "|".join("---:" if c in ("current", "proposed", "demand", "upper", "rate") else "---" for c in COLUMNS) + "|")
    for r in _sorted(rows):
        out.append("| " + " | ".join(c.replace("|", "\\|") for c in _cells(r)) + " |")
    out += ["", summary(rows)]
    return "\n".join(out) + "\n"


def to_json(rows: Sequence[ReviewRow]) -> str:
    """A JSON list of objects, one per container (keys: COLUMNS + EXTRA_KEYS)."""
    return json.dumps([r.as_dict() for r in _sorted(rows)], indent=2) + "\n"


def summary(rows: Sequence[ReviewRow]) -> str:
    """One line: containers by verdict, and the net change of reserved CPU if all proposals went in."""
    counts: dict[str, int] = {}
    delta = 0
    for r in rows:
        counts[r.verdict] = counts.get(r.verdict, 0) + 1
        if r.verdict in ("Changed", "Proposed") and r.proposed_m is not None and r.current_m is not None:
            delta += r.proposed_m - r.current_m
    parts = ", ".join(f"{v}: {n}" for v, n in sorted(counts.items())) or "no containers"
    return f"{len(rows)} containers ({parts}); net change of requests {delta:+d}m (one pod of each workload)"


def render(rows: Sequence[ReviewRow], output: str = "table") -> str:
    if output == "table":
        return to_table(rows)
    if output == "json":
        return to_json(rows)
    if output == "markdown":
        return to_markdown(rows)
    raise ValueError(f"output {output!r}: choose one of {', '.join(FORMATS)}")
