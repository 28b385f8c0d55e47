"""Steady state: reuse a policy's last decision, status verdict and review rows when
nothing it depends on changed since the last pass (work proportional to what changed).

Per policy the memo keeps what the last pass saw — the policy object's uid and
resourceVersion (its spec, generation AND status: every status write bumps it), the
workload's resourceVersion, the pods' resourceVersions (in-place), every container's
inputs (request, limit, rate, sizing answer, input problems, model facts, staleness
verdict), the autoscaler view, the conflict — and what the pass made of it: the final
decision, its review rows and CPU gauge samples, and whether the stored status already
said everything (nothing written).

An entry is remembered only when the decision was a **fixed point that did not read
the clock or the budget**:

- nothing changed in the cluster (no container ``Changed``) and the act stage left the
  decision as it was (no ``Rejected``);
- no container waited on the clock or the budget: ``Settling`` (its message counts the
  seconds, and the settle period ends with time), ``CoolingDown``, ``BudgetSpent``, nor
  a gate that may hide one of those (``HorizontalConflict``, ``InPlaceUnsupported``:
  under them a settling decrease becomes due with time);
- the history to persist equals the history read from the status (a new settling
  record stamped ``now`` is not a fixed point);
- with writes on, the writer found the stored status current (nothing written, so no
  Event either); a pass that did not reach the writer (not leader) remembers nothing.

Why that is enough (``controller/decide.py``): ``now`` enters a decision only through
the settle wait (outcomes Settling; a fresh settle window, which changes the history;
or a change), the cooldown (consulted only when a container would change: outcomes
CoolingDown or a change), and the history's lastChangeTime (only when something
changed). ``Proposed`` (dry-run) is reached only once the settle wait and the cooldown
are over, which stays so while the clock moves forward — the memo is not used when the
wall clock went backwards. The budget (token bucket, rollout slots) is read only when a
container would change (outcomes Changed or BudgetSpent); ``Budget.view`` only refills
the bucket, which is the same whenever it is read, so not reading it changes nothing.
The backoff deadline is read only for a change. A policy whose inputs are the same and
whose last decision was such a fixed point therefore decides the same again, builds
the same rows and finds its status current again: all three are reused.

``tests/test_steady_pass.py`` runs the same sequence of passes (some things change,
others not) with and without the memo and compares decisions, statuses and writes.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, fields
from datetime import datetime

from ratefit.controller.decide import Verdict, WorkloadDecision, Why
from ratefit.controller.policy import WorkloadHistory
from ratefit.controller.review import ReviewRow
from ratefit.controller.stages.decide import history_of
from ratefit.controller.stages.observe import Observed
from ratefit.controller.telemetry import CpuSample

__all__ = ["Remembered", "SteadyMemo", "cpu_samples", "inputs_key"]

#: outcomes that waited on the clock or the budget, or may hide one that did
CLOCK_OR_BUDGET = frozenset({
    Why.SETTLING, Why.COOLING_DOWN, Why.BUDGET_SPENT, Why.REJECTED, Why.HORIZONTAL_CONFLICT,
    Why.IN_PLACE_UNSUPPORTED,
})


@dataclass(frozen=True)
class Remembered:
    """One policy's last pass, reusable while its inputs stay the same."""

    key: tuple[object, ...]
    decision: WorkloadDecision | None
    rows: tuple[ReviewRow, ...]
    samples: tuple[CpuSample, ...]
    #: the wall clock of the pass that decided (reuse only while the clock moves forward)
    now: datetime


#: fields of :class:`Observed` stood for by resourceVersions in the key: the policy object
#: (``policy`` and ``invalid`` are parsed from its spec), the workload and the pods
_BY_VERSION = frozenset({"obj", "policy", "invalid", "workload", "pods"})
#: every other field of Observed is compared as it is — a field added for a new hold
#: reason is part of the key without anyone having to remember this module
_BY_VALUE = tuple(f.name for f in fields(Observed) if f.name not in _BY_VERSION)


def inputs_key(o: Observed) -> tuple[object, ...] | None:
    """Everything the decision, the status and the rows of ``o`` read, as one comparable
    value (None: not comparable — objects without a resourceVersion, or not observed)."""
    if o.unavailable or not o.obj.resource_version or not o.obj.uid:
        return None
    w = o.workload
    if w is not None and not w.resource_version:
        return None
    pods = None if o.pods is None else tuple((p.uid, p.resource_version) for p in o.pods)
    return (o.obj.uid, o.obj.resource_version, None if w is None else (w.uid, w.resource_version), pods,
            *(getattr(o, name) for name in _BY_VALUE))


def fixed_point(o: Observed, wd: WorkloadDecision | None, *, status_current: bool) -> bool:
    """True when deciding ``o`` again on the same inputs gives the same decision, rows
    and status (see the module docstring)."""
    if not status_current:
        return False
    if wd is None:
        return o.invalid is not None or o.problem is not None
    for d in wd.decisions:
        if d.verdict is Verdict.CHANGED or d.why in CLOCK_OR_BUDGET:
            return False
    return same_history(wd.history, history_of(o, o.workload), [d.container for d in wd.decisions])


def same_history(a: WorkloadHistory, b: WorkloadHistory, containers: list[str]) -> bool:
    """The two histories persist the same (a container without a record has the empty one)."""
    names = set(containers) | set(a.containers) | set(b.containers)
    return a.last_change == b.last_change and all(a.container(n) == b.container(n) for n in names)


def cpu_samples(rows: tuple[ReviewRow, ...]) -> tuple[CpuSample, ...]:
    """The per-container CPU gauges of a policy's rows."""
    return tuple(CpuSample(namespace=r.namespace, workload=f"{r.kind}/{r.workload}", container=r.container,
                           request_m=r.current_m, demand_m=r.demand_m, demand_bound_m=r.upper_m) for r in rows)


class SteadyMemo:
    """The last fixed point of each policy (``namespace``, ``name``) → :class:`Remembered`."""

    def __init__(self) -> None:
        self._last: dict[tuple[str, str], Remembered] = {}
        #: policies reused / decided in the last pass (for the benchmark and the pass phases)
        self.reused = 0
        self.decided = 0

    def __len__(self) -> int:
        return len(self._last)

    def lookup(self, o: Observed, now: datetime) -> tuple[tuple[object, ...] | None, Remembered | None]:
        """(the inputs key of ``o``, its remembered pass when that is reusable now)."""
        key = inputs_key(o)
        got = self._last.get((o.obj.namespace, o.obj.name))
        if key is None or got is None or got.key != key or now < got.now:
            return key, None
        return key, got

    def remember(self, o: Observed, key: tuple[object, ...] | None, wd: WorkloadDecision | None,
                 rows: tuple[ReviewRow, ...], samples: tuple[CpuSample, ...], now: datetime, *,
                 status_current: bool) -> None:
        """Keep this pass of ``o`` when it is a fixed point; forget it otherwise."""
        name = (o.obj.namespace, o.obj.name)
        if key is not None and fixed_point(o, wd, status_current=status_current):
            self._last[name] = Remembered(key=key, decision=wd, rows=rows, samples=samples, now=now)
        else:
            self._last.pop(name, None)

    def forget(self, o: Observed) -> None:
        self._last.pop((o.obj.namespace, o.obj.name), None)

    def keep_only(self, names: Mapping[tuple[str, str], object] | set[tuple[str, str]]) -> None:
        """Forget policies that were not in this pass (deleted, or now another shard's)."""
        for gone in [k for k in self._last if k not in names]:
            del self._last[gone]

    def clear(self) -> None:
        self._last.clear()
