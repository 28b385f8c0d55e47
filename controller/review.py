"""The review: one row per container of every SizingPolicy, as a table, JSON or Markdown.

This is what an engineer reads before letting anything change (``ratefit plan``, the
demo, the log of ``ratefit run``). Each row carries the fixed columns

    workload, container, current, proposed, demand, demand_bound, rate, verdict, why, message

(JSON: a list of objects with exactly these keys plus the extra keys listed in
:data:`EXTRA_KEYS`). CPU values are Kubernetes quantities in canonical millicores
(``"250m"``) and are per pod; ``rate`` is requests per second per pod (the policy's
percentile); ``why`` is the reason for the verdict; ``message`` says it in words —
the final target when a change is cut by the step limit, the model key that is
missing, what would release a hold. The table prints the message on a second line
under its row; Markdown and JSON carry it as a field.

Totals (what a person pays for): per workload and in total, the CPU requested now
and after the proposals **across all replicas** (cores), the change, and the change
per pod. Only changed/proposed rows move; a row whose replica count is unknown (the
workload could not be read) is left out of the totals and counted as such. The
policy name is shown beside the workload when two policies name the same workload.

Rows of a policy that resizes in place say in ``message`` that resizing running
pods leaves the workload's template unchanged, so new pods start at the template
value (Kubernetes docs, "Resize CPU and Memory Resources assigned to Containers").
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from typing import Any

__all__ = [
    "ReviewRow",
    "COLUMNS",
    "EXTRA_KEYS",
    "FORMATS",
    "WorkloadTotal",
    "Totals",
    "totals",
    "render",
    "to_json",
    "to_markdown",
    "to_table",
]

#: the columns every output has, in this order (the table prints ``message`` on a second line)
COLUMNS = (
    "workload", "container", "current", "proposed", "demand", "demand_bound", "rate", "verdict", "why", "message",
)
#: further keys of the JSON objects
EXTRA_KEYS = (
    "namespace",
    "policy",
    "kind",
    "mode",
    "resize_by",
    "replicas",
    "current_m",
    "proposed_m",
    "demand_m",
    "demand_bound_m",
    "change_per_pod_m",
    "change_m",
    "limit",
    "proposed_limit",
    "extrapolated",
    "cgroup",
    "cores_per_100_rps",
    "cores_per_100_rps_suggested",
)
FORMATS = ("table", "json", "markdown")

IN_PLACE_NOTE = (
    "in-place: running pods are resized; the workload template is unchanged, "
    "so new pods start at the template value"
)

#: what releases a hold, for rows whose decision came without a message of its own
HINTS = {
    "NoMetrics": "no usable per-pod request rate: check the rate query with ratefit check",
    "NoModel": "the sizing API has no model for this container: train it (ratefit train) and reload the API",
    "Extrapolated": "the rate is beyond the trained range: retrain the model or set allowExtrapolation",
    "HorizontalConflict": "an HPA scales this workload on CPU utilisation: set allowHorizontalConflict to change anyway",
    "InPlaceUnsupported": "a resize cannot make this change: resize by rollout instead",
    "CoolingDown": "the workload changed recently: the change waits for the cooldown",
    "BudgetSpent": "the cluster-wide change budget is spent: retried next pass",
    "Settling": "a decrease waits until the target has stayed low for the settle period",
    "InsideDeadband": "the target is within the deadband of the current request: nothing to do",
    "ApiUnavailable": "the workload could not be listed: the last status is kept; retried next pass",
    "WorkloadNotFound": "the workload named by the policy does not exist: fix spec.workload",
    "PolicyInvalid": "the policy does not validate: fix the field named",
    "Rejected": "the API server refused the change: see the Event for its message",
    "QueryRefused": "the policy's rateQuery reads outside its namespace: fix spec rateQuery",
    "QueryFailed": "Prometheus refused the rate query: fix the query (ratefit check prints it)",
    "TooManySeries": "the rate query answered too many series: narrow it to the workload's pods",
    "InvalidModelKey": "the model key is not NAMESPACE/WORKLOAD/CONTAINER: fix the container's model",
    "DemandOutOfRange": "the sizing API answered a demand beyond any bound: retrain the model",
    "ContainerMissing": "the workload has no such container: fix spec.containers",
}

_MOVING = ("changed", "proposed")


def fmt_m(millicores: int | None) -> str:
    """Millicores as a canonical Kubernetes CPU quantity (``250m``), ``-`` when unknown."""
    return "-" if millicores is None else f"{int(millicores)}m"


def fmt_cores(millicores: int) -> str:
    """Millicores as cores with three decimals (``1.250``)."""
    return f"{millicores / 1000.0:.3f}"


def fmt_change_m(millicores: int | None) -> str:
    return "-" if millicores is None else f"{int(millicores):+d}m"


def fmt_change_cores(millicores: int) -> str:
    return f"{millicores / 1000.0:+.3f}"


def _norm(text: str) -> str:
    """An enum value in any spelling (``in-place``, ``InPlace``) as ``inplace``."""
    return text.replace("-", "").replace("_", "").lower()


@dataclass(frozen=True)
class ReviewRow:
    """One container's line of the review (plain values; built by the reconcile pass).

    ``upper_m`` is the demand bound (demand + the model's band) in millicores, ``note``
    the row's message, ``method`` how the policy resizes (rollout or in-place)."""

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
    #: the workload's replicas (spec.replicas) as observed this pass; None: not observed
    replicas: int | None = None
    #: reserved cores per 100 req/s of the workload's load, now and at the suggested size
    cores_per_100: float | None = None
    cores_per_100_suggested: float | None = None

    @property
    def why_text(self) -> str:
        return ",".join(self.why)

    @property
    def demand_bound_m(self) -> int | None:
        return self.upper_m

    @property
    def in_place(self) -> bool:
        return _norm(self.method) == "inplace"

    @property
    def moving(self) -> bool:
        """True when the row proposes (or made) a change of the request."""
        return (self.verdict.lower() in _MOVING and self.proposed_m is not None and self.current_m is not None)

    @property
    def change_per_pod_m(self) -> int | None:
        """Proposed − current for one pod (0 for a row that does not move; None: unknown)."""
        if self.moving:
            return int(self.proposed_m) - int(self.current_m)  # type: ignore[arg-type]
        return 0 if self.current_m is not None else None

    @property
    def change_m(self) -> int | None:
        """The change across all replicas (None when the replica count is unknown)."""
        per_pod = self.change_per_pod_m
        return None if per_pod is None or self.replicas is None else per_pod * self.replicas

    @property
    def message(self) -> str:
        """The row's reason in words (the decision's message, else what releases the hold),
        plus the in-place note for policies that resize in place."""
        text = self.note
        if not text and self.verdict.lower() not in _MOVING:
            text = next((HINTS[w] for w in self.why if w in HINTS), "")
        if self.in_place and IN_PLACE_NOTE not in text:
            text = f"{text}; {IN_PLACE_NOTE}" if text else IN_PLACE_NOTE
        return text

    def as_dict(self) -> dict[str, Any]:
        """The JSON object of this row: the fixed :data:`COLUMNS` then :data:`EXTRA_KEYS`."""
        return {
            "workload": f"{self.kind}/{self.workload}",
            "container": self.container,
            "current": None if self.current_m is None else fmt_m(self.current_m),
            "proposed": None if self.proposed_m is None else fmt_m(self.proposed_m),
            "demand": None if self.demand_m is None else fmt_m(self.demand_m),
            "demand_bound": None if self.upper_m is None else fmt_m(self.upper_m),
            "rate": None if self.rate is None else round(float(self.rate), 4),
            "verdict": self.verdict,
            "why": self.why_text,
            "message": self.message,
            "namespace": self.namespace,
            "policy": self.policy,
            "kind": self.kind,
            "mode": self.mode,
            "resize_by": self.method,
            "replicas": self.replicas,
            "current_m": self.current_m,
            "proposed_m": self.proposed_m,
            "demand_m": self.demand_m,
            "demand_bound_m": self.upper_m,
            "change_per_pod_m": self.change_per_pod_m,
            "change_m": self.change_m,
            "limit": None if self.limit_m is None else fmt_m(self.limit_m),
            "proposed_limit": None if self.proposed_limit_m is None else fmt_m(self.proposed_limit_m),
            "extrapolated": bool(self.extrapolated),
            "cgroup": self.cgroup,
            "cores_per_100_rps": None if self.cores_per_100 is None else round(self.cores_per_100, 4),
            "cores_per_100_rps_suggested": (
                None if self.cores_per_100_suggested is None else round(self.cores_per_100_suggested, 4)),
        }


# ------------------------------------------------------------------ totals


@dataclass(frozen=True)
class WorkloadTotal:
    """One workload's CPU requests across its replicas (millicores), now and after the proposals."""

    namespace: str
    kind: str
    workload: str
    policy: str
    replicas: int | None
    now_m: int
    after_m: int
    #: the change of one pod (all its reviewed containers together)
    change_per_pod_m: int

    @property
    def change_m(self) -> int:
        return self.after_m - self.now_m

    @property
    def name(self) -> str:
        return f"{self.namespace}/{self.kind}/{self.workload}"


@dataclass(frozen=True)
class Totals:
    workloads: tuple[WorkloadTotal, ...]
    #: rows left out of the totals: replicas or the current request unknown
    unknown_rows: int

    @property
    def now_m(self) -> int:
        return sum(w.now_m for w in self.workloads)

    @property
    def after_m(self) -> int:
        return sum(w.after_m for w in self.workloads)

    @property
    def change_m(self) -> int:
        return self.after_m - self.now_m


def totals(rows: Iterable[ReviewRow]) -> Totals:
    """Per workload (and policy) and in total: requested CPU across all replicas now and
    after the proposals. A row counts when its replicas and current request are known."""
    acc: dict[tuple[str, str, str, str], list[int]] = {}
    replicas: dict[tuple[str, str, str, str], int] = {}
    unknown = 0
    for r in rows:
        if r.replicas is None or r.current_m is None:
            unknown += 1
            continue
        k = (r.namespace, r.kind, r.workload, r.policy)
        a = acc.setdefault(k, [0, 0, 0])
        per_pod = r.change_per_pod_m or 0
        a[0] += r.current_m * r.replicas
        a[1] += (r.current_m + per_pod) * r.replicas
        a[2] += per_pod
        replicas[k] = r.replicas
    out = tuple(
        WorkloadTotal(namespace=k[0], kind=k[1], workload=k[2], policy=k[3], replicas=replicas[k],
                      now_m=a[0], after_m=a[1], change_per_pod_m=a[2])
        for k, a in sorted(acc.items())
    )
    return Totals(workloads=out, unknown_rows=unknown)


def _ambiguous(rows: Iterable[ReviewRow]) -> set[tuple[str, str, str]]:
    """Workloads that more than one policy names."""
    seen: dict[tuple[str, str, str], set[str]] = {}
    for r in rows:
        seen.setdefault((r.namespace, r.kind, r.workload), set()).add(r.policy)
    return {k for k, ps in seen.items() if len(ps) > 1}


# ------------------------------------------------------------------ formats


def _workload_cell(r: ReviewRow, ambiguous: set[tuple[str, str, str]]) -> str:
    name = f"{r.namespace}/{r.kind}/{r.workload}"
    return f"{name}[policy={r.policy}]" if (r.namespace, r.kind, r.workload) in ambiguous else name


def _cells(row: ReviewRow, ambiguous: set[tuple[str, str, str]] = frozenset()) -> list[str]:  # type: ignore[assignment]
    d = row.as_dict()
    return [
        _workload_cell(row, ambiguous),
        row.container,
        d["current"] or "-",
        d["proposed"] or "-",
        d["demand"] or "-",
        d["demand_bound"] or "-",
        "-" if row.rate is None else f"{row.rate:.3g}",
        row.verdict,
        row.why_text or "-",
    ]


def _sorted(rows: Iterable[ReviewRow]) -> list[ReviewRow]:
    return sorted(rows, key=lambda r: (r.namespace, r.kind, r.workload, r.policy, r.container))


def _total_cells(t: Totals, ambiguous: set[tuple[str, str, str]]) -> list[list[str]]:
    body = [
        [w.name + (f"[policy={w.policy}]" if (w.namespace, w.kind, w.workload) in ambiguous else ""),
         str(w.replicas), fmt_cores(w.now_m), fmt_cores(w.after_m), fmt_change_cores(w.change_m),
         fmt_change_m(w.change_per_pod_m)]
        for w in t.workloads
    ]
    body.append(["total", str(sum(w.replicas or 0 for w in t.workloads)), fmt_cores(t.now_m), fmt_cores(t.after_m),
                 fmt_change_cores(t.change_m), "-"])
    return body


TOTAL_COLUMNS = ("workload", "replicas", "requested_now", "requested_after", "change", "change_per_pod")


def _aligned(header: Sequence[str], body: Sequence[Sequence[str]], right: set[int]) -> list[str]:
    widths = [max(len(h), *(len(b[i]) for b in body)) if body else len(h) for i, h in enumerate(header)]

    def line(cells: Sequence[str]) -> str:
        return "  ".join(c.rjust(w) if i in right else c.ljust(w) for i, (c, w) in enumerate(zip(cells, widths))).rstrip()

    return [line(header), *(line(b) for b in body)]


def to_table(rows: Sequence[ReviewRow]) -> str:
    """A fixed-width text table for a terminal: each row's message on the line below it,
    then the totals across replicas, then the one-line summary."""
    amb = _ambiguous(rows)
    ordered = _sorted(rows)
    header = [h.upper() for h in COLUMNS[:-1]]
    lines = _aligned(header, [_cells(r, amb) for r in ordered], right={2, 3, 4, 5, 6})
    out = [lines[0]]
    for r, text in zip(ordered, lines[1:]):
        out.append(text)
        if r.message:
            out.append(f"    -> {r.message}")
    t = totals(rows)
    out += ["", "CPU requested across all replicas (cores; change per pod in millicores):"]
    out += _aligned([h.upper() for h in TOTAL_COLUMNS], _total_cells(t, amb), right={1, 2, 3, 4, 5})
    out.append(summary(rows))
    return "\n".join(out) + "\n"


def _md(text: str) -> str:
    return text.replace("|", "\\|").replace("\n", " ")


def to_markdown(rows: Sequence[ReviewRow], *, title: str | None = None) -> str:
    """GitHub-flavoured Markdown: the review table (pipes escaped), then the totals table."""
    amb = _ambiguous(rows)
    out = []
    if title:
        out += [f"# {title}", ""]
    out.append("| " + " | ".join(COLUMNS) + " |")
    numeric = ("current", "proposed", "demand", "demand_bound", "rate")
    out.append("|" + "|".join("---:" if c in numeric else "---" for c in COLUMNS) + "|")
    for r in _sorted(rows):
        out.append("| " + " | ".join(_md(c) for c in [*_cells(r, amb), r.message or "-"]) + " |")
    t = totals(rows)
    out += ["", "CPU requested across all replicas (cores; change per pod in millicores):", ""]
    out.append("| " + " | ".join(TOTAL_COLUMNS) + " |")
    out.append("|---|" + "|".join("---:" for _ in TOTAL_COLUMNS[1:]) + "|")
    for cells in _total_cells(t, amb):
        out.append("| " + " | ".join(_md(c) for c in cells) + " |")
    out += ["", summary(rows)]
    return "\n".join(out) + "\n"


def to_json(rows: Sequence[ReviewRow]) -> str:
    """A JSON list of objects, one per container (keys: COLUMNS + EXTRA_KEYS)."""
    return json.dumps([r.as_dict() for r in _sorted(rows)], indent=2) + "\n"


def summary(rows: Sequence[ReviewRow]) -> str:
    """One line: containers by verdict, and the change of requested CPU across all replicas
    if every proposal went in."""
    counts: dict[str, int] = {}
    for r in rows:
        counts[r.verdict] = counts.get(r.verdict, 0) + 1
    parts = ", ".join(f"{v}: {n}" for v, n in sorted(counts.items())) or "no containers"
    t = totals(rows)
    text = (f"{len(rows)} containers ({parts}); requested CPU across all replicas {fmt_cores(t.now_m)} -> "
            f"{fmt_cores(t.after_m)} cores ({fmt_change_cores(t.change_m)})")
    if t.unknown_rows:
        text += f"; {t.unknown_rows} containers left out (replicas or current request unknown)"
    return text


def render(rows: Sequence[ReviewRow], output: str = "table") -> str:
    if output == "table":
        return to_table(rows)
    if output == "json":
        return to_json(rows)
    if output == "markdown":
        return to_markdown(rows)
    raise ValueError(f"output {output!r}: choose one of {', '.join(FORMATS)}")
