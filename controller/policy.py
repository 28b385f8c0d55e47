"""SizingPolicy: the custom resource's spec and status as pydantic models, and the
frozen dataclasses the pure decision code works on.

The boundary (a custom object read from the API server, or a YAML file) is parsed by
pydantic models whose aliases are the camelCase field names of the CRD
(``manifests/crd/sizingpolicy.yaml``) and whose defaults are the CRD's defaults;
``parse_policy`` turns a whole object into a frozen :class:`Policy`, or raises
:class:`PolicyInvalid` naming the field and the problem. An invalid policy is never
acted on: reconcile writes :func:`invalid_condition` into its status instead.

Also here: what the status keeps so that a restart or a leader change loses nothing
(``lastChangeTime`` per workload, ``belowSinceTime``/``peakTarget`` on each
``containers[]`` row — see :class:`WorkloadHistory`), and the Kubernetes condition helpers (conditions keyed by
``type``; ``lastTransitionTime`` moves only when ``status`` changes — Kubernetes API
conventions, "Typical status properties").

Kubernetes API conventions shape the spec: enum values in CamelCase (``DryRun``,
``InPlace``, ``KeepRatio``), no floating-point numbers (``headroomPercent: 15``,
``stepLimit.maxIncreasePercent: 100``); inside, the frozen :class:`Policy` keeps
fractions (``headroom`` 0.15, ``step_limit.up`` 2.0) for the decision code.

Durations are Prometheus durations (``90s``, ``10m``, ``1h30m``, ``7d``; largest unit
first, each once); they become float seconds. ``cooldown`` and ``settle`` may be ``0s``
(off); ``rateWindow`` must be positive. CPU quantities (``floor``, ``ceiling``)
become whole millicores through ``ratefit.controller.quantity.parse_cpu``.
"""

from __future__ import annotations

import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import datetime, timezone
from enum import StrEnum
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator
from pydantic.alias_generators import to_camel

from ratefit.controller.quantity import format_cpu, parse_cpu
from ratefit.models.durations import format_duration as _format_duration
from ratefit.models.durations import parse_duration as _parse_duration
from ratefit.models.errors import InputError
from ratefit.models.keys import KEY_RE

__all__ = [
    "GROUP",
    "VERSION",
    "KIND",
    "PLURAL",
    "Mode",
    "ResizeBy",
    "CpuLimit",
    "StepLimit",
    "ContainerRule",
    "Policy",
    "PolicyInvalid",
    "parse_policy",
    "parse_duration",
    "format_duration",
    "ContainerHistory",
    "WorkloadHistory",
    "history_from_status",
    "history_to_status",
    "format_time",
    "parse_time",
    "CONDITION_READY",
    "CONDITION_INPUTS",
    "CONDITION_CONFLICT",
    "REASON_POLICY_INVALID",
    "make_condition",
    "set_condition",
    "invalid_condition",
    "SizingPolicySpec",
    "SizingPolicyStatus",
    "METHOD_DEFAULTS",
    "WorkloadRefSpec",
    "ContainerSpec",
    "StepLimitSpec",
    "ConditionModel",
    "ContainerStatusModel",
]

# the CRD's coordinates live in controller/crd.py (re-exported here for old imports)
from ratefit.controller.crd import GROUP, KIND, PLURAL, VERSION  # noqa: E402

#: Condition type written on every policy: True once a pass decided it with inputs for
#: at least one container; False when the policy is invalid (PolicyInvalid), its workload
#: is missing, it is held by an older policy (PolicyConflict) or every container lacks inputs.
CONDITION_READY = "Ready"
#: True when every container had its rate and its model this pass; False names what is missing.
CONDITION_INPUTS = "InputsAvailable"
#: True when an older SizingPolicy names the same workload (this one is held).
CONDITION_CONFLICT = "Conflict"
REASON_POLICY_INVALID = "PolicyInvalid"


class Mode(StrEnum):
    DRY_RUN = "DryRun"  # decide and report (status, Event, log, metric); never patch
    APPLY = "Apply"  # patch the workload (or resize pods) when the verdict is Changed


class ResizeBy(StrEnum):
    ROLLOUT = "Rollout"  # patch the pod template: a rolling update
    IN_PLACE = "InPlace"  # the pods' resize subresource, one pod at a time


class CpuLimit(StrEnum):
    KEEP_RATIO = "KeepRatio"  # scale the CPU limit by the request's factor
    KEEP = "Keep"  # leave the limit; the request never goes above it (AtLimit)
    DROP = "Drop"  # remove the CPU limit (not possible with resizeBy InPlace)


# ---------------------------------------------------------------- durations

_ZERO = re.compile(r"^(?=.)(0+y)?(0+w)?(0+d)?(0+h)?(0+m)?(0+s)?(0+ms)?$")  # units in order, each once


def parse_duration(text: str, *, field: str = "duration", allow_zero: bool = False) -> float:
    """A Prometheus duration (``90s``, ``10m``, ``1h30m``, ``7d``; the shared parser
    ``ratefit.models.durations``) → seconds. ``allow_zero`` also accepts ``0s``
    (cooldown and settle may be switched off)."""
    if allow_zero and isinstance(text, str) and _ZERO.match(text):
        return 0.0
    return _parse_duration(text, field=field)


def format_duration(seconds: float) -> str:
    """Inverse of :func:`parse_duration`: 5400 → ``"1h30m"``, 0 → ``"0s"``."""
    return "0s" if seconds == 0 else _format_duration(seconds)


# ---------------------------------------------------------------- pydantic models (the boundary)

_MODEL_KEY = KEY_RE  # the one key grammar (models/keys.py), shared with the CRD and the sizing API


class _Camel(BaseModel):
    model_config = ConfigDict(
        alias_generator=to_camel, populate_by_name=True, extra="forbid", frozen=True
    )


class WorkloadRefSpec(_Camel):
    kind: Literal["Deployment", "StatefulSet"]
    name: str = Field(min_length=1, max_length=253)


class StepLimitSpec(_Camel):
    max_increase_percent: int = Field(default=100, strict=True)
    max_decrease_percent: int = Field(default=50, strict=True)


class ContainerSpec(_Camel):
    name: str = Field(min_length=1, max_length=63)
    model: str
    rate_query: str | None = None
    floor: str | int = "10m"
    ceiling: str | int | None = None

    @field_validator("floor", "ceiling", mode="before")
    @classmethod
    def _quantity_type(cls, v: Any) -> Any:
        # Same as the CRD (int-or-string): a bare YAML float like 0.5 is refused there too.
        if v is None or isinstance(v, str) or (isinstance(v, int) and not isinstance(v, bool)):
            return v
        raise ValueError(f"{v!r} must be a quantity string like '500m' or '0.5' (quote decimals) or whole cores")

    @field_validator("model")
    @classmethod
    def _model_key(cls, v: str) -> str:
        if not _MODEL_KEY.match(v):
            raise ValueError(
                f"{v!r} is not a model key; write namespace/workload/container, "
                "e.g. 'parcels/tracking-api/api'"
            )
        return v


class Retrain(StrEnum):
    """What happens when a container's model is marked stale (issue 13)."""

    MANUAL = "Manual"  # flag it (condition, Event, metric); a person retrains
    AUTO = "Auto"  # the controller retrains it from recent samples (controller/retrain)


class SizingPolicySpec(_Camel):
    workload: WorkloadRefSpec
    mode: Mode = Mode.DRY_RUN
    resize_by: ResizeBy = ResizeBy.ROLLOUT
    containers: list[ContainerSpec] = Field(min_length=1)
    headroom_percent: int = Field(default=15, strict=True)
    deadband_percent: int = Field(default=10, strict=True)
    #: cooldown, settle, rateWindow — None: the resizeBy's default (:data:`METHOD_DEFAULTS`);
    #: the CRD sets no default for these three
    cooldown: str | None = None
    settle: str | None = None
    step_limit: StepLimitSpec = StepLimitSpec()
    rate_window: str | None = None
    rate_percentile: int = Field(default=95, strict=True)
    cpu_limit: CpuLimit = CpuLimit.KEEP_RATIO
    allow_horizontal_conflict: bool = False
    allow_extrapolation: bool = False
    #: the HPA metric (Pods/Object/External, AverageValue target) that is this policy's
    #: request rate; unset: the HPA's only Pods metric, if it has exactly one
    autoscaler_rate_metric: str | None = Field(None, min_length=1, max_length=253,
                                               pattern=r"^[A-Za-z_:][A-Za-z0-9_:.\-/]*$")
    retrain: Retrain = Retrain.MANUAL


#: ``cooldown``, ``settle`` and ``rateWindow`` when the policy leaves them out, by resizeBy.
#: A rollout restarts every pod, so it is sized for the daily peak (the rate percentile
#: over a day: no daily up-and-down rollouts). An in-place resize restarts nothing and
#: follows the daily cycle: the rate over half an hour, decreases after 30 minutes, a change
#: at most every 15 minutes. Chosen with ``ratefit replay`` on the demo scenario
#: (DEVELOPERS.md, "Replay: the defaults").
METHOD_DEFAULTS = {
    "Rollout": {"cooldown": "30m", "settle": "2h", "rateWindow": "1d"},
    "InPlace": {"cooldown": "15m", "settle": "30m", "rateWindow": "30m"},
}


class ConditionModel(_Camel):
    type: str
    status: Literal["True", "False", "Unknown"]
    observed_generation: int | None = None
    last_transition_time: str
    reason: str
    message: str = ""


class ContainerStatusModel(_Camel):
    """One row of ``status.containers[]`` (built by ``decide.Decision.to_status`` and the
    record stage). ``newRequest``/``newLimit`` only when the verdict is Changed or Proposed;
    ``belowSinceTime``/``peakTarget`` while a decrease settles."""

    name: str
    current: str | None = None
    new_request: str | None = None
    target: str | None = None
    current_limit: str | None = None
    new_limit: str | None = None
    demand: str | None = None
    demand_bound: str | None = None
    rate: float | None = None
    extrapolated: bool = False
    verdict: Literal["Changed", "Proposed", "Held"]
    reason: str
    message: str = ""
    below_since_time: str | None = None
    peak_target: str | None = None


class SizingPolicyStatus(_Camel):
    observed_generation: int | None = None
    effective_mode: Mode | None = None
    summary: str | None = None
    conditions: list[ConditionModel] = []
    containers: list[ContainerStatusModel] = []
    last_change_time: str | None = None


# ---------------------------------------------------------------- frozen values (the inside)


@dataclass(frozen=True)
class StepLimit:
    """Per change the request moves at most ×``up`` and at least ×``down`` (from the
    spec's percentages: up = 1 + maxIncreasePercent/100, down = 1 − maxDecreasePercent/100)."""

    up: float = 2.0
    down: float = 0.5


@dataclass(frozen=True)
class ContainerRule:
    name: str
    model: str  # sizing API key namespace/workload/container
    rate_query: str | None  # PromQL giving per-pod rates; None: the controller's template
    floor_m: int
    ceiling_m: int | None  # None: no ceiling


@dataclass(frozen=True)
class Policy:
    namespace: str
    name: str
    generation: int | None
    workload_kind: str  # Deployment | StatefulSet
    workload_name: str
    containers: tuple[ContainerRule, ...]
    mode: Mode = Mode.DRY_RUN
    resize_by: ResizeBy = ResizeBy.ROLLOUT
    headroom: float = 0.15  # fraction (spec headroomPercent / 100)
    deadband: float = 0.10  # fraction (spec deadbandPercent / 100)
    cooldown_s: float = 1800.0
    settle_s: float = 7200.0
    step_limit: StepLimit = StepLimit()
    rate_window_s: float = 3600.0
    rate_percentile: float = 95.0
    cpu_limit: CpuLimit = CpuLimit.KEEP_RATIO
    allow_horizontal_conflict: bool = False
    allow_extrapolation: bool = False
    #: PromQL metric name of the rate a horizontal autoscaler scales on (None: not set)
    autoscaler_rate_metric: str | None = None
    retrain: Retrain = Retrain.MANUAL

    @property
    def key(self) -> str:
        """``namespace/name`` of the policy."""
        return f"{self.namespace}/{self.name}"

    @property
    def workload_key(self) -> str:
        """``namespace/Kind/name`` of the workload (the cooldown and rollout key)."""
        return f"{self.namespace}/{self.workload_kind}/{self.workload_name}"

    def container(self, name: str) -> ContainerRule:
        for c in self.containers:
            if c.name == name:
                return c
        raise KeyError(name)


class PolicyInvalid(InputError):
    """A SizingPolicy that cannot be acted on. ``field`` is the dotted path inside the
    object (e.g. ``spec.stepLimit.maxDecreasePercent``), ``problem`` says why and how to fix it."""

    def __init__(self, field: str, problem: str, *, policy: str = "") -> None:
        self.field = field
        self.problem = problem
        self.policy = policy
        where = f"SizingPolicy {policy}: " if policy else ""
        super().__init__(f"{where}{field}: {problem}")


def _loc(loc: Sequence[int | str], prefix: str) -> str:
    out = prefix
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += f".{part}"
    return out


def parse_policy(obj: Mapping[str, Any]) -> Policy:
    """A SizingPolicy object (as read from the API server or a YAML file) → Policy.

    Raises PolicyInvalid naming the first wrong field, e.g.
    ``spec.containers[0].floor: '300m' is above ceiling '200m'``."""
    meta = obj.get("metadata") or {}
    namespace = meta.get("namespace") or "default"
    name = meta.get("name") or ""
    key = f"{namespace}/{name}" if name else ""
    if obj.get("apiVersion", f"{GROUP}/{VERSION}") != f"{GROUP}/{VERSION}":
        raise PolicyInvalid("apiVersion", f"expected {GROUP}/{VERSION}, got {obj.get('apiVersion')!r}", policy=key)
    if obj.get("kind", KIND) != KIND:
        raise PolicyInvalid("kind", f"expected {KIND}, got {obj.get('kind')!r}", policy=key)
    raw = obj.get("spec")
    if not isinstance(raw, Mapping):
        raise PolicyInvalid("spec", "missing; a SizingPolicy needs spec.workload and spec.containers", policy=key)
    try:
        spec = SizingPolicySpec.model_validate(dict(raw))
    except ValidationError as exc:
        err = exc.errors()[0]
        where = _loc(err["loc"], "spec")
        msg = err["msg"].removeprefix("Value error, ")
        if err["type"] == "extra_forbidden":
            msg = "unknown field (check the spelling against manifests/crd/sizingpolicy.yaml)"
        elif err["type"] == "missing":
            msg = "required field is missing"
        raise PolicyInvalid(where, msg, policy=key) from exc
    return _to_policy(spec, namespace=namespace, name=name, generation=meta.get("generation"), key=key)


def _to_policy(spec: SizingPolicySpec, *, namespace: str, name: str, generation: int | None, key: str) -> Policy:
    def bad(field: str, problem: str) -> PolicyInvalid:
        return PolicyInvalid(field, problem, policy=key)

    if not 0 <= spec.headroom_percent <= 1000:
        raise bad("spec.headroomPercent",
                  f"{spec.headroom_percent} must be between 0 and 1000 (15 = 15 % above the demand bound)")
    if not 0 <= spec.deadband_percent <= 99:
        raise bad("spec.deadbandPercent",
                  f"{spec.deadband_percent} must be between 0 and 99 (10 = ignore changes under 10 %)")
    inc, dec = spec.step_limit.max_increase_percent, spec.step_limit.max_decrease_percent
    if not 0 <= inc <= 10000:
        raise bad("spec.stepLimit.maxIncreasePercent", f"{inc} must be between 0 and 10000 (100 = at most double per change)")
    if not 0 <= dec <= 99:
        raise bad("spec.stepLimit.maxDecreasePercent", f"{dec} must be between 0 and 99 (50 = at most halve per change)")
    up, down = 1.0 + inc / 100.0, 1.0 - dec / 100.0
    if not 1 <= spec.rate_percentile <= 100:
        raise bad("spec.ratePercentile", f"{spec.rate_percentile} must be between 1 and 100 (95 = p95)")
    durations = {}
    given = {"cooldown": spec.cooldown, "settle": spec.settle, "rateWindow": spec.rate_window}
    for fname, text in given.items():
        if text is None:
            text = METHOD_DEFAULTS[spec.resize_by.value][fname]
        try:
            durations[fname] = parse_duration(text, field=f"spec.{fname}", allow_zero=fname != "rateWindow")
        except InputError as exc:
            raise bad(f"spec.{fname}", str(exc).split(": ", 1)[1]) from exc
    if spec.resize_by is ResizeBy.IN_PLACE and spec.cpu_limit is CpuLimit.DROP:
        raise bad("spec.cpuLimit", "'Drop' cannot be used with resizeBy 'InPlace': a resize cannot remove a limit")
    containers: list[ContainerRule] = []
    seen: set[str] = set()
    for i, c in enumerate(spec.containers):
        where = f"spec.containers[{i}]"
        if c.name in seen:
            raise bad(f"{where}.name", f"container {c.name!r} is listed twice")
        seen.add(c.name)
        try:
            floor_m = parse_cpu(c.floor, field=f"{where}.floor")
            ceiling_m = None if c.ceiling is None else parse_cpu(c.ceiling, field=f"{where}.ceiling")
        except InputError as exc:
            f, _, problem = str(exc).partition(": ")
            raise bad(f, problem) from exc
        if floor_m < 1:
            raise bad(f"{where}.floor", f"{c.floor!r} must be at least 1m")
        if ceiling_m is not None and floor_m > ceiling_m:
            raise bad(f"{where}.floor", f"{c.floor!r} is above ceiling {c.ceiling!r}; floor must be <= ceiling")
        if c.rate_query is not None and not c.rate_query.strip():
            raise bad(f"{where}.rateQuery", "is empty; leave it out to use the controller's template")
        containers.append(ContainerRule(name=c.name, model=c.model, rate_query=c.rate_query, floor_m=floor_m, ceiling_m=ceiling_m))
    return Policy(
        namespace=namespace,
        name=name,
        generation=generation,
        workload_kind=spec.workload.kind,
        workload_name=spec.workload.name,
        containers=tuple(containers),
        mode=spec.mode,
        resize_by=spec.resize_by,
        headroom=spec.headroom_percent / 100.0,
        deadband=spec.deadband_percent / 100.0,
        cooldown_s=durations["cooldown"],
        settle_s=durations["settle"],
        step_limit=StepLimit(up=up, down=down),
        rate_window_s=durations["rateWindow"],
        rate_percentile=float(spec.rate_percentile),
        cpu_limit=spec.cpu_limit,
        allow_horizontal_conflict=spec.allow_horizontal_conflict,
        allow_extrapolation=spec.allow_extrapolation,
        autoscaler_rate_metric=spec.autoscaler_rate_metric,
        retrain=spec.retrain,
    )


# ---------------------------------------------------------------- times


def format_time(t: datetime) -> str:
    """RFC 3339 in UTC at whole seconds, as metav1.Time serialises (``2026-12-01T22:45:00Z``)."""
    if t.tzinfo is None:
        raise ValueError("use timezone-aware datetimes (UTC)")
    return t.astimezone(timezone.utc).replace(microsecond=0).strftime("%Y-%m-%dT%H:%M:%SZ")


def parse_time(text: str) -> datetime:
    """RFC 3339 (``Z`` or an offset) → aware datetime in UTC."""
    t = datetime.fromisoformat(text.replace("Z", "+00:00"))
    if t.tzinfo is None:
        t = t.replace(tzinfo=timezone.utc)
    return t.astimezone(timezone.utc)


# ---------------------------------------------------------------- history kept in status


@dataclass(frozen=True)
class ContainerHistory:
    """Settling state of one container: since when the target has stayed below the
    current request, and the highest target seen since then (a decrease goes to
    that peak, never to a single low reading). ``proposed_m``: the DryRun proposal the
    status shows (its row's ``newRequest`` with verdict Proposed), which a later
    proposal keeps while it moves less than the deadband (decide.py, step 8)."""

    below_since: datetime | None = None
    peak_m: int | None = None
    proposed_m: int | None = None


@dataclass(frozen=True)
class WorkloadHistory:
    """What the decision needs from earlier passes: the last applied change of the
    workload (cooldown) and each container's settling state."""

    last_change: datetime | None = None
    containers: Mapping[str, ContainerHistory] = field(default_factory=dict)

    def container(self, name: str) -> ContainerHistory:
        return self.containers.get(name, ContainerHistory())


def history_from_status(status: Mapping[str, Any] | None) -> WorkloadHistory:
    """Read ``status.lastChangeTime`` and each ``status.containers[]`` row's
    ``belowSinceTime``/``peakTarget``. Entries that cannot be read are dropped (the worst
    case is settling starts over: slower, never faster)."""
    if not status:
        return WorkloadHistory()
    last_change = None
    if isinstance(status.get("lastChangeTime"), str):
        try:
            last_change = parse_time(status["lastChangeTime"])
        except ValueError:
            last_change = None
    containers: dict[str, ContainerHistory] = {}
    rows = status.get("containers")
    for entry in rows if isinstance(rows, list) else ():
        if not isinstance(entry, Mapping):
            continue
        name, since, peak = entry.get("name"), entry.get("belowSinceTime"), entry.get("peakTarget")
        if not isinstance(name, str):
            continue
        proposed = None
        if entry.get("verdict") == "Proposed" and isinstance(entry.get("newRequest"), str | int):
            try:
                proposed = parse_cpu(entry["newRequest"], field="newRequest")
            except (ValueError, TypeError, InputError):
                proposed = None
        settling = None
        if isinstance(since, str) and isinstance(peak, str | int):
            try:
                settling = (parse_time(since), parse_cpu(peak, field="peakTarget"))
            except (ValueError, TypeError, InputError):
                settling = None
        if settling is None and proposed is None:
            continue
        containers[name] = ContainerHistory(below_since=settling[0] if settling else None,
                                            peak_m=settling[1] if settling else None, proposed_m=proposed)
    return WorkloadHistory(last_change=last_change, containers=containers)


def history_to_status(history: WorkloadHistory, rows: Sequence[Mapping[str, Any]] = ()) -> dict[str, Any]:
    """The status fields for a history: ``lastChangeTime`` and ``containers[]`` — the
    given rows (keyed by ``name``) with ``belowSinceTime``/``peakTarget`` set from the
    history (left out where a container is not settling)."""
    out_rows: list[dict[str, Any]] = []
    for row in rows:
        r = {k: v for k, v in row.items() if k not in ("belowSinceTime", "peakTarget")}
        h = history.containers.get(str(r.get("name")))
        if h is not None and h.below_since is not None and h.peak_m is not None:
            r["belowSinceTime"], r["peakTarget"] = format_time(h.below_since), format_cpu(h.peak_m)
        out_rows.append(r)
    return {
        "lastChangeTime": None if history.last_change is None else format_time(history.last_change),
        "containers": out_rows,
    }


# ---------------------------------------------------------------- conditions


def make_condition(
    *, type: str, status: bool | str, reason: str, message: str, observed_generation: int | None, now: datetime
) -> dict[str, Any]:
    """A condition dict in the Kubernetes shape (status 'True'/'False'/'Unknown')."""
    if isinstance(status, bool):
        status = "True" if status else "False"
    if status not in ("True", "False", "Unknown"):
        raise ValueError(f"condition status must be True, False or Unknown, got {status!r}")
    if not re.match(r"^[A-Za-z]([A-Za-z0-9_,:]*[A-Za-z0-9_])?$", reason):
        raise ValueError(f"condition reason must be CamelCase, got {reason!r}")
    cond: dict[str, Any] = {"type": type, "status": status}
    if observed_generation is not None:
        cond["observedGeneration"] = observed_generation
    cond.update(lastTransitionTime=format_time(now), reason=reason, message=message)
    return cond


def set_condition(conditions: Iterable[Mapping[str, Any]] | None, new: Mapping[str, Any]) -> list[dict[str, Any]]:
    """Merge ``new`` into a condition list keyed by ``type`` and return a new list.

    If a condition of that type exists with the same ``status``, its
    ``lastTransitionTime`` is kept (reason, message and observedGeneration are
    updated); otherwise ``new`` replaces it. Order of the other conditions is kept."""
    out: list[dict[str, Any]] = []
    placed = False
    for cond in conditions or ():
        if cond.get("type") != new["type"]:
            out.append(dict(cond))
            continue
        merged = dict(new)
        if cond.get("status") == new["status"] and cond.get("lastTransitionTime"):
            merged["lastTransitionTime"] = cond["lastTransitionTime"]
        if not placed:
            out.append(merged)
            placed = True
    if not placed:
        out.append(dict(new))
    return out


def invalid_condition(err: PolicyInvalid, *, observed_generation: int | None, now: datetime) -> dict[str, Any]:
    """The Ready=False condition of a policy that is never acted on, saying what is wrong."""
    return make_condition(
        type=CONDITION_READY,
        status=False,
        reason=REASON_POLICY_INVALID,
        message=f"{err.field}: {err.problem}; the policy is not acted on until it is fixed",
        observed_generation=observed_generation,
        now=now,
    )
