"""Record (pure): what a pass has to say about each policy, built from its observation
and final decision — the new status, the Kubernetes Events, the decision log records
and the review rows. No I/O here: ``stages/write.py`` writes what this builds.

- :func:`new_status` — conditions merged by type (``Ready``, ``InputsAvailable``,
  ``Conflict``), ``containers[]`` keyed by name (with each settling container's
  ``belowSinceTime``/``peakTarget``), ``lastChangeTime``, ``effectiveMode`` (what the
  controller actually does: ``Apply`` under ``run --dry-run`` is ``DryRun``) and
  ``summary`` (``1 proposed, 6 held``). None when the observation was partial (the API
  failed): the last status is kept.
- :func:`validate_status` — the CRD's status model (``policy.SizingPolicyStatus``)
  checks a status before it is written (only then: most passes write nothing).
- :func:`status_is_current` — level-based: a status that says nothing new is not written.
- :func:`events_for` — one Event per kind of news (never the same twice), recorded
  regarding the workload (related: the policy) and again regarding the policy (related:
  the workload), so ``kubectl describe`` shows it on both; a conflict is a Warning
  Event on the newer policy naming the older.
- :func:`decision_records` — one JSON log record per container, flagged when it changed.
- :func:`review_rows` — the review (``ratefit plan``, the Markdown review).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from datetime import datetime
from typing import TYPE_CHECKING

from pydantic import ValidationError

from ratefit.controller.cgroup import cgroup_figures
from ratefit.controller.decide import INPUT_REASONS, Decision, Verdict, WorkloadDecision, Why
from ratefit.controller.policy import (
    CONDITION_CONFLICT,
    CONDITION_INPUTS,
    CONDITION_READY,
    Mode,
    ResizeBy,
    SizingPolicyStatus,
    history_to_status,
    invalid_condition,
    make_condition,
    set_condition,
)
from ratefit.controller.review import ReviewRow
from ratefit.controller.workload import EventType, ObjectRef, Workload
from ratefit.models.errors import RatefitError

if TYPE_CHECKING:  # the observation's type only; no runtime import of the observe stage
    from ratefit.controller.stages.observe import Observed

__all__ = [
    "EventNote",
    "StatusInvalid",
    "decision_records",
    "events_for",
    "new_status",
    "review_rows",
    "status_is_current",
]

#: the Ready reason of a policy whose workload does not exist
WORKLOAD_NOT_FOUND = Why.WORKLOAD_NOT_FOUND.value
#: the summary's words, in this order
_VERDICT_WORDS = ((Verdict.CHANGED, "changed"), (Verdict.PROPOSED, "proposed"), (Verdict.HELD, "held"))


class StatusInvalid(RatefitError):
    """The status built for a policy does not fit the CRD's status schema (a bug: report it)."""


@dataclass(frozen=True)
class EventNote:
    """One Kubernetes Event to emit."""

    regarding: ObjectRef
    related: ObjectRef
    reason: str
    type: EventType
    action: str
    note: str


def _held_rows(old: Mapping[str, object], reason: Why, message: str) -> list[dict[str, object]]:
    """The stored rows, each now Held for ``reason`` (nothing is decided), keeping what
    they recorded of the current request and the settle history."""
    rows = old.get("containers")
    out: list[dict[str, object]] = []
    for r in rows if isinstance(rows, list) else ():
        if not isinstance(r, Mapping) or not isinstance(r.get("name"), str):
            continue
        row: dict[str, object] = {"name": r["name"]}
        for k in ("current", "currentLimit", "belowSinceTime", "peakTarget"):
            if isinstance(r.get(k), str):
                row[k] = r[k]
        row.update(verdict=Verdict.HELD.value, reason=reason.value, message=message)
        out.append(row)
    return out


def effective_mode(o: Observed, *, dry_run: bool) -> Mode | None:
    """What the controller actually does for this policy: DryRun under ``run --dry-run``
    or ``plan``, else the spec's mode (None: the spec could not be read)."""
    if o.policy is None:
        return None
    return Mode.DRY_RUN if dry_run else o.policy.mode


def summary_of(decisions: tuple[Decision, ...]) -> str:
    """``1 proposed, 6 held`` — the containers by verdict (the ``Summary`` column)."""
    counts = {v: sum(1 for d in decisions if d.verdict is v) for v, _ in _VERDICT_WORDS}
    return ", ".join(f"{counts[v]} {w}" for v, w in _VERDICT_WORDS if counts[v]) or "no containers"


def _inputs_condition(wd: WorkloadDecision, gen: int | None, now: datetime) -> dict[str, object]:
    """InputsAvailable: False naming each container whose rate or model was missing."""
    missing = [d for d in wd.decisions if d.why in INPUT_REASONS]
    if not missing:
        return make_condition(type=CONDITION_INPUTS, status=True, reason="InputsFound",
                              message="every container had its request rate and its model",
                              observed_generation=gen, now=now)
    order = [w for w in Why if w in INPUT_REASONS]
    reason = min((d.why for d in missing), key=order.index)
    parts = [f"{d.container}: {d.why.value} ({d.message})" if d.message else f"{d.container}: {d.why.value}"
             for d in missing]
    return make_condition(type=CONDITION_INPUTS, status=False, reason=reason.value,
                          message=f"{len(missing)} of {len(wd.decisions)} containers lack inputs; " + "; ".join(parts),
                          observed_generation=gen, now=now)


def new_status(
    o: Observed, wd: WorkloadDecision | None, now: datetime, *, dry_run: bool = False,
) -> dict[str, object] | None:
    """The policy's new status (None: keep the stored one — the workload could not be
    observed, so nothing is known that the stored status does not already say).
    ``dry_run``: the controller runs with ``--dry-run`` (effectiveMode DryRun)."""
    if o.unavailable:
        return None
    old = dict(o.obj.status or {})
    gen = o.obj.generation
    conditions = old.get("conditions") or []
    status: dict[str, object] = {"observedGeneration": gen}
    mode = effective_mode(o, dry_run=dry_run)
    if mode is not None:
        status["effectiveMode"] = mode.value
    if o.invalid is not None:
        cond = invalid_condition(o.invalid, observed_generation=gen, now=now)
        status["conditions"] = set_condition(conditions, cond)
        status["containers"] = _held_rows(old, Why.POLICY_INVALID, str(cond["message"]))
        status["summary"] = "policy invalid"
        if old.get("lastChangeTime") is not None:
            status["lastChangeTime"] = old["lastChangeTime"]
    elif wd is None:
        cond = make_condition(
            type=CONDITION_READY, status=False, reason=WORKLOAD_NOT_FOUND,
            message=(o.problem or "the workload could not be read") + "; nothing is changed until it exists",
            observed_generation=gen, now=now,
        )
        status["conditions"] = set_condition(conditions, cond)
        status["containers"] = _held_rows(old, Why.WORKLOAD_NOT_FOUND, str(cond["message"]))
        status["summary"] = "workload not found"
        if old.get("lastChangeTime") is not None:
            status["lastChangeTime"] = old["lastChangeTime"]
    else:
        summary = summary_of(wd.decisions)
        inputs = _inputs_condition(wd, gen, now)
        if o.conflict_with is not None:
            ready = make_condition(
                type=CONDITION_READY, status=False, reason=Why.POLICY_CONFLICT.value,
                message=f"held: SizingPolicy {o.conflict_with} is older and sizes the same workload",
                observed_generation=gen, now=now,
            )
        elif wd.decisions and all(d.why in INPUT_REASONS for d in wd.decisions):
            ready = make_condition(
                type=CONDITION_READY, status=False, reason="InputsMissing",
                message=f"every container is held for missing inputs ({summary}); see {CONDITION_INPUTS}",
                observed_generation=gen, now=now,
            )
        else:
            ready = make_condition(
                type=CONDITION_READY, status=True, reason="Decided",
                message=f"{len(wd.decisions)} containers decided: {summary}", observed_generation=gen, now=now,
            )
        conflict = make_condition(
            type=CONDITION_CONFLICT, status=o.conflict_with is not None,
            reason=Why.POLICY_CONFLICT.value if o.conflict_with is not None else "NoConflict",
            message=(f"SizingPolicy {o.conflict_with} is older and names the same workload; it keeps acting and "
                     "this one is held until one of the two is deleted or names another workload"
                     if o.conflict_with is not None else "no older SizingPolicy names this workload"),
            observed_generation=gen, now=now,
        )
        for cond in (ready, inputs, conflict):
            conditions = set_condition(conditions, cond)
        fresh = model_fresh_condition(o, gen, now)
        if fresh is not None:
            conditions = set_condition(conditions, fresh)
        status["conditions"] = conditions
        status["summary"] = summary
        # the CRD's schema has no nullable fields: leave unknown values out
        rows = [{k: v for k, v in d.to_status().items() if v is not None} for d in wd.decisions]
        status.update(history_to_status(wd.history, rows))
    return status


def validate_status(status: dict[str, object], *, where: str) -> dict[str, object]:
    """``status`` checked against the CRD's status model; returned unchanged."""
    try:
        SizingPolicyStatus.model_validate(status)
    except ValidationError as exc:
        first = exc.errors()[0]
        loc = ".".join(str(x) for x in first.get("loc", ()))
        raise StatusInvalid(f"status built for {where} does not fit the CRD at {loc}: {first.get('msg')}") from None
    return status


def comparable(status: Mapping[str, object]) -> dict[str, object]:
    """Status as comparable plain data: None values dropped (the server prunes them, and
    the merge patch deletes them), and without what only ages — the rows' free-text
    messages such as "1234s of 7200s settle" — so a pass with only newer wording writes
    nothing. The status is shallow (lists of flat objects), so one level of lists is enough."""
    out: dict[str, object] = {}
    for k, v in status.items():
        if v is None:
            continue
        if isinstance(v, list):
            drop = "message" if k == "containers" else None
            v = [{kk: vv for kk, vv in item.items() if vv is not None and kk != drop} if isinstance(item, Mapping)
                 else item for item in v]
        out[k] = v
    return out


def status_is_current(new: Mapping[str, object], old: Mapping[str, object]) -> bool:
    """True when the stored status already says everything ``new`` says."""
    return comparable(new) == comparable({k: old.get(k) for k in new})


#: ``status.containers[]`` fields that only report what the pass saw — the rate, the
#: model's demand and band at it, the target they give — as opposed to what was decided
#: (verdict, reason, current and new request/limit) and the history the next decision
#: reads (belowSinceTime, peakTarget, lastChangeTime), which are never deferred
FIGURE_FIELDS = frozenset({"rate", "demand", "demandBound", "target"})
#: what of a condition is decisional: its message may carry figures (a ratio, a count)
_CONDITION_KEYS = ("type", "status", "reason", "observedGeneration")


def decisional(status: Mapping[str, object]) -> dict[str, object]:
    """:func:`comparable` without the figures: the container rows without
    :data:`FIGURE_FIELDS`, the conditions without their messages and times."""
    out = comparable(status)
    rows = out.get("containers")
    if isinstance(rows, list):
        out["containers"] = [{k: v for k, v in r.items() if k not in FIGURE_FIELDS} if isinstance(r, Mapping) else r
                             for r in rows]
    conds = out.get("conditions")
    if isinstance(conds, list):
        out["conditions"] = [{k: c.get(k) for k in _CONDITION_KEYS} if isinstance(c, Mapping) else c for c in conds]
    return out


def figures_only(new: Mapping[str, object], old: Mapping[str, object]) -> bool:
    """True when ``new`` differs from the stored status only in figures (see
    :data:`FIGURE_FIELDS`): the writer may defer such a write (``stages/write.py``)."""
    return decisional(new) == decisional({k: old.get(k) for k in new})


def _same(before: Mapping[str, object] | None, now_p: Mapping[str, object]) -> bool:
    return before is not None and all(before.get(k) == now_p.get(k) for k in ("verdict", "reason", "newRequest", "current"))


def _old_condition(old_status: Mapping[str, object], type_: str) -> Mapping[str, object]:
    conds = old_status.get("conditions") or []
    return {c.get("type"): c for c in conds if isinstance(c, Mapping)}.get(type_, {})  # type: ignore[union-attr]


def _old_ready(old_status: Mapping[str, object]) -> Mapping[str, object]:
    return _old_condition(old_status, CONDITION_READY)


def events_for(
    o: Observed, wd: WorkloadDecision | None, workload: Workload | None, old_status: Mapping[str, object], now: datetime,
) -> list[EventNote]:
    """The Events of a policy whose status changed: one per workload and kind of news,
    naming every container it concerns; a proposal already in the status is not news."""
    if o.unavailable:
        return []
    regarding = workload.ref if workload is not None else o.obj.ref

    def note(reason: str, type_: EventType, action: str, text: str) -> EventNote:
        return EventNote(regarding=regarding, related=o.obj.ref, reason=reason, type=type_, action=action, note=text)

    if o.invalid is not None:
        ready = _old_ready(old_status)
        message = invalid_condition(o.invalid, observed_generation=None, now=now)["message"]
        if ready.get("reason") != "PolicyInvalid" or ready.get("message") != message:
            return [note("PolicyInvalid", EventType.WARNING, "Validate", f"{o.invalid.field}: {o.invalid.problem}")]
        return []
    if wd is None:
        if _old_ready(old_status).get("reason") != WORKLOAD_NOT_FOUND:
            return [note(WORKLOAD_NOT_FOUND, EventType.WARNING, "Read",
                         (o.problem or "the workload could not be read") + "; nothing is changed")]
        return []
    if o.conflict_with is not None:
        old = _old_condition(old_status, CONDITION_CONFLICT)
        if old.get("status") != "True" or o.conflict_with not in str(old.get("message", "")):
            text = (f"SizingPolicy {o.conflict_with} is older and names the same workload "
                    f"{o.policy.workload_key if o.policy else ''}; it keeps acting and this policy is held")
            return [EventNote(regarding=o.obj.ref, related=regarding, reason=Why.POLICY_CONFLICT.value,
                              type=EventType.WARNING, action="Hold", note=text)]
        return []
    old_props = _old_proposals(old_status)
    news: dict[str, list[str]] = {}
    for d in wd.decisions:
        if _same(old_props.get(d.container), d.to_status()):
            continue
        if d.verdict is Verdict.CHANGED:
            news.setdefault("CpuRequestChanged", []).append(f"{d.container}: {d.message}")
        elif d.verdict is Verdict.PROPOSED:
            news.setdefault("CpuRequestProposed", []).append(f"{d.container}: {d.message}")
        elif d.why is Why.REJECTED:
            news.setdefault("CpuRequestRejected", []).append(f"{d.container}: {d.message}")
    # the action names what ratefit does (or would do): a rollout of the template or an in-place resize
    action = "Resize" if o.policy is not None and o.policy.resize_by is ResizeBy.IN_PLACE else "Rollout"
    out = []
    stale_text = stale_news(o, old_status)
    if stale_text:
        out.append(note(Why.MODEL_STALE.value, EventType.WARNING, "Judge", stale_text))
    for reason, notes in news.items():
        text = "; ".join(notes)
        if reason == "CpuRequestProposed":
            text, type_ = text + " (DryRun: nothing changed)", EventType.NORMAL
        else:
            type_ = EventType.NORMAL if reason == "CpuRequestChanged" else EventType.WARNING
        out.append(note(reason, type_, action, text))
        if workload is not None:  # the same news on the policy, so `kubectl describe` on it shows it
            out.append(EventNote(regarding=o.obj.ref, related=workload.ref, reason=reason, type=type_,
                                 action=action, note=text))
    return out


def _old_proposals(old_status: Mapping[str, object]) -> dict[object, Mapping[str, object]]:
    rows = old_status.get("containers") or []
    return {p.get("name"): p for p in rows if isinstance(p, Mapping)}  # type: ignore[union-attr]


def decision_records(
    o: Observed, wd: WorkloadDecision | None, old_status: Mapping[str, object], *, dry_run: bool,
) -> list[tuple[bool, dict[str, object]]]:
    """One decision log record per container: (changed since the stored status, record)."""
    if wd is None or o.policy is None or o.invalid is not None:
        return []
    old_props = _old_proposals(old_status)
    mode = Mode.DRY_RUN.value if dry_run else o.policy.mode.value
    out = []
    for d in wd.decisions:
        now_p = d.to_status()
        record = {"msg": "decision", "policy": o.policy.key, "workload": o.policy.workload_key, **now_p,
                  "effectiveMode": mode}
        out.append((not _same(old_props.get(d.container), now_p), record))
    return out


def _m(cores: float | None) -> int | None:
    return None if cores is None else int(math.ceil(round(cores * 1000.0, 6)))


def review_rows(o: Observed, wd: WorkloadDecision | None, *, dry_run: bool) -> list[ReviewRow]:
    """The policy's rows of the review: one per container."""
    obj = o.obj
    spec_workload = obj.spec.get("workload") or {}
    kind = o.policy.workload_kind if o.policy else str(spec_workload.get("kind", "?"))
    wname = o.policy.workload_name if o.policy else str(spec_workload.get("name", "?"))
    if o.invalid is not None or wd is None or o.policy is None:
        names = [c.name for c in o.policy.containers] if o.policy else [
            str(c.get("name", "?")) for c in (obj.spec.get("containers") or []) if isinstance(c, Mapping)] or ["-"]
        if o.invalid is not None:
            why, note = (Why.POLICY_INVALID.value,), f"{o.invalid.field}: {o.invalid.problem}"
        elif o.unavailable:
            why, note = (Why.API_UNAVAILABLE.value,), o.problem or ""
        else:
            why, note = (WORKLOAD_NOT_FOUND,), o.problem or ""
        return [ReviewRow(namespace=obj.namespace, policy=obj.name, kind=kind, workload=wname, container=n,
                          verdict=Verdict.HELD.value, why=why, note=note) for n in names]
    method = o.policy.resize_by.value
    mode = (Mode.DRY_RUN if (dry_run or o.policy.mode is Mode.DRY_RUN) else Mode.APPLY).value
    rows = []
    for d in wd.decisions:
        moving = d.verdict is not Verdict.HELD or d.moves
        rows.append(ReviewRow(
            namespace=obj.namespace, policy=obj.name, kind=kind, workload=wname, container=d.container,
            verdict=d.verdict.value, why=(d.why.value,), current_m=d.current_m,
            proposed_m=d.proposed_m if moving else d.current_m,
            demand_m=_m(d.demand), upper_m=_m(d.upper), rate=d.rate, limit_m=d.limit_m,
            proposed_limit_m=d.proposed_limit_m, mode=mode, method=method, extrapolated=d.extrapolated,
            note=d.message, cgroup=_cgroup(d.proposed_m, d.proposed_limit_m),
            replicas=o.workload.replicas if o.workload is not None else None,
            cores_per_100=d.cores_per_100_now, cores_per_100_suggested=d.cores_per_100_suggested,
        ))
    return rows


def _cgroup(request_m: int | None, limit_m: int | None) -> dict[str, object] | None:
    """What the kernel gets for a request/limit (controller/cgroup)."""
    if request_m is None:
        return None
    try:
        f = cgroup_figures(request_m, limit_m)
    except (ValueError, TypeError):  # a review extra must never break a pass
        return None
    return {"shares": f.shares, "weight_linear": f.weight_linear, "weight_log": f.weight_log,
            "quota_us": f.quota_us, "period_us": f.period_us, "cpu_max": f.cpu_max}


# ---------------------------------------------------------------- stale models (issue 13)

#: the condition that says whether the policy's models still match recent usage
CONDITION_MODEL_FRESH = "ModelFresh"


def _stale_inputs(o: Observed) -> tuple[list, list]:
    checked = [i for i in o.inputs if getattr(i, "stale", None) is not None]
    return checked, [i for i in checked if i.stale.stale]


def model_fresh_condition(o: Observed, generation: int | None, now: datetime) -> dict[str, object] | None:
    """``ModelFresh``: False (reason ModelStale) when any container's model was marked stale
    this pass, True (reason WithinBand) when every checked one held; None when nothing was
    checked (the staleness check is off or had no data: the condition is left as it was).
    The message names the containers and their exceedance ratio to two decimals (so a pass
    that only moves the third decimal writes nothing)."""
    checked, stale = _stale_inputs(o)
    if not checked:
        return None
    if stale:
        parts = []
        for i in stale:
            st = i.stale
            what = f"exceedance ratio {st.ratio:.2f} of {st.samples} samples" if st.significant else ""
            if st.image_changed:
                what = (what + "; " if what else "") + st.image_changed
            parts.append(f"{i.name}: {what}")
        return make_condition(type=CONDITION_MODEL_FRESH, status=False, reason=Why.MODEL_STALE.value,
                              message="model stale, decreases held until it is retrained: " + "; ".join(parts),
                              observed_generation=generation, now=now)
    return make_condition(type=CONDITION_MODEL_FRESH, status=True, reason="WithinBand",
                          message=f"recent CPU usage of {len(checked)} containers is within their models' band",
                          observed_generation=generation, now=now)


def stale_news(o: Observed, old_status: Mapping[str, object]) -> str:
    """The Warning Event text when a model became stale (empty: no news — not stale, or
    the stored ModelFresh condition already says False)."""
    checked, stale = _stale_inputs(o)
    if not stale:
        return ""
    conds = old_status.get("conditions") or []
    old = {c.get("type"): c for c in conds if isinstance(c, Mapping)}.get(CONDITION_MODEL_FRESH, {})  # type: ignore[union-attr]
    if old.get("status") == "False":
        return ""
    return "; ".join(f"{i.name}: {i.stale.message()}" for i in stale)
