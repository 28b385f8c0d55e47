"""SizingPolicy parsing, defaults, validation, history in status, and conditions.

Sources: Kubernetes API conventions ("Typical status properties": conditions keyed by
type; lastTransitionTime changes only when status changes; reason CamelCase);
metav1.Time serialises RFC 3339 at whole seconds (from memory); quantities through
``ratefit.controller.quantity`` (itself checked against kubernetes.utils.parse_quantity).
"""

from __future__ import annotations

import copy
from datetime import datetime, timedelta, timezone

import pytest
from hypothesis import given
from hypothesis import strategies as st

from ratefit.controller.policy import (
    CONDITION_READY,
    ContainerHistory,
    CpuLimit,
    Mode,
    PolicyInvalid,
    ResizeBy,
    WorkloadHistory,
    format_duration,
    format_time,
    history_from_status,
    history_to_status,
    invalid_condition,
    make_condition,
    parse_duration,
    parse_policy,
    parse_time,
    set_condition,
)
from ratefit.models.errors import InputError

T0 = datetime(2026, 12, 1, 12, 0, tzinfo=timezone.utc)

MINIMAL = {
    "apiVersion": "ratefit.dev/v1alpha1",
    "kind": "SizingPolicy",
    "metadata": {"name": "tracking-api", "namespace": "dispatch", "generation": 3},
    "spec": {
        "workload": {"kind": "Deployment", "name": "tracking-api"},
        "containers": [{"name": "api", "model": "dispatch/tracking-api/api"}],
    },
}


def with_spec(**changes) -> dict:
    obj = copy.deepcopy(MINIMAL)
    obj["spec"].update(changes)
    return obj


def with_container(**changes) -> dict:
    obj = copy.deepcopy(MINIMAL)
    obj["spec"]["containers"][0].update(changes)
    return obj


def test_defaults():
    p = parse_policy(MINIMAL)
    assert (p.namespace, p.name, p.generation) == ("dispatch", "tracking-api", 3)
    assert p.key == "dispatch/tracking-api" and p.workload_key == "dispatch/Deployment/tracking-api"
    assert p.mode is Mode.DRY_RUN and p.resize_by is ResizeBy.ROLLOUT and p.cpu_limit is CpuLimit.KEEP_RATIO
    assert (p.mode.value, p.resize_by.value, p.cpu_limit.value) == ("DryRun", "Rollout", "KeepRatio")
    assert (p.headroom, p.deadband) == (0.15, 0.10)
    # method rollout: sized for the daily peak (rateWindow 1d; issue 12 changed it from 1h)
    assert (p.cooldown_s, p.settle_s, p.rate_window_s) == (1800.0, 7200.0, 86400.0)
    in_place = parse_policy({**MINIMAL, "spec": {**MINIMAL["spec"], "method": "in-place"}})
    assert (in_place.cooldown_s, in_place.settle_s, in_place.rate_window_s) == (900.0, 1800.0, 1800.0)
    assert (p.step_limit.up, p.step_limit.down) == (2.0, 0.5)
    assert p.rate_percentile == 95.0
    assert not p.allow_horizontal_conflict and not p.allow_extrapolation and p.autoscaler_rate_metric is None
    (c,) = p.containers
    assert (c.name, c.model, c.rate_query, c.floor_m, c.ceiling_m) == ("api", "dispatch/tracking-api/api", None, 10, None)


def test_quantities_and_durations_parsed():
    p = parse_policy(
        with_spec(cooldown="90s", settle="1h30m", rateWindow="10m", containers=[
            {"name": "api", "model": "dispatch/tracking-api/api", "floor": "0.25", "ceiling": 2, "rateQuery": "up"}
        ])
    )
    assert (p.cooldown_s, p.settle_s, p.rate_window_s) == (90.0, 5400.0, 600.0)
    c = p.containers[0]
    # Kubernetes quantity: "0.25" = 250m, integer 2 = 2 cores = 2000m (Kubernetes docs, "Resource units")
    assert (c.floor_m, c.ceiling_m, c.rate_query) == (250, 2000, "up")


def test_percentages_map_to_fractions_and_factors():
    # up = 1 + maxIncreasePercent/100, down = 1 - maxDecreasePercent/100 (issue 10)
    p = parse_policy(with_spec(headroomPercent=20, deadbandPercent=5, ratePercentile=99,
                               stepLimit={"maxIncreasePercent": 50, "maxDecreasePercent": 25},
                               autoscalerRateMetric="kestrel_http_requests_total"))
    assert (p.headroom, p.deadband, p.rate_percentile) == (0.20, 0.05, 99.0)
    assert (p.step_limit.up, p.step_limit.down) == (1.5, 0.75)
    assert p.autoscaler_rate_metric == "kestrel_http_requests_total"


def test_policy_is_frozen():
    p = parse_policy(MINIMAL)
    with pytest.raises(AttributeError):
        p.mode = Mode.APPLY  # type: ignore[misc]


@pytest.mark.parametrize(
    "obj,field,words",
    [
        (with_container(floor="300m", ceiling="200m"), "spec.containers[0].floor", "ceiling"),
        (with_spec(deadbandPercent=100), "spec.deadbandPercent", "between 0 and 99"),
        (with_spec(deadbandPercent=-1), "spec.deadbandPercent", "between 0 and 99"),
        (with_spec(deadbandPercent=0.1), "spec.deadbandPercent", "integer"),
        (with_spec(headroomPercent=15.5), "spec.headroomPercent", "integer"),
        (with_spec(stepLimit={"maxIncreasePercent": -10}), "spec.stepLimit.maxIncreasePercent", "between"),
        (with_spec(stepLimit={"maxDecreasePercent": 100}), "spec.stepLimit.maxDecreasePercent", "between 0 and 99"),
        (with_spec(stepLimit={"up": 2.0}), "spec.stepLimit.up", "unknown field"),
        (with_spec(cooldown="10 minutes"), "spec.cooldown", "duration"),
        (with_spec(settle=""), "spec.settle", "duration"),
        (with_spec(rateWindow="0s"), "spec.rateWindow", "zero"),
        (with_spec(ratePercentile=0), "spec.ratePercentile", "between 1 and 100"),
        (with_spec(ratePercentile=99.5), "spec.ratePercentile", "integer"),
        (with_spec(mode="auto"), "spec.mode", "DryRun"),
        (with_spec(mode="dry-run"), "spec.mode", "DryRun"),
        (with_spec(cpuLimit="Drop", resizeBy="InPlace"), "spec.cpuLimit", "remove a limit"),
        (with_spec(method="Rollout"), "spec.method", "unknown field"),
        (with_spec(workload={"kind": "DaemonSet", "name": "x"}), "spec.workload.kind", "Deployment"),
        (with_spec(headroomPercent=-5), "spec.headroomPercent", "between"),
        (with_spec(colldown="5m"), "spec.colldown", "unknown field"),
        (with_container(floor="lots"), "spec.containers[0].floor", "quantity"),
        (with_container(floor="0m"), "spec.containers[0].floor", "at least 1m"),
        (with_container(ceiling=0.5), "spec.containers[0].ceiling", "quote"),
        (with_container(model="tracking-api"), "spec.containers[0].model", "namespace/workload/container"),
        (with_container(rateQuery="  "), "spec.containers[0].rateQuery", "empty"),
        (with_spec(containers=[]), "spec.containers", "at least 1"),
        (
            with_spec(containers=[{"name": "api", "model": "a/b/c"}, {"name": "api", "model": "a/b/d"}]),
            "spec.containers[1].name",
            "twice",
        ),
        ({**MINIMAL, "spec": None}, "spec", "missing"),
        ({**MINIMAL, "apiVersion": "ratefit.dev/v2"}, "apiVersion", "v1alpha1"),
    ],
)
def test_invalid_policies_name_the_field(obj, field, words):
    with pytest.raises(PolicyInvalid) as exc:
        parse_policy(obj)
    assert exc.value.field == field
    assert words in exc.value.problem, exc.value.problem
    assert str(exc.value).startswith("SizingPolicy dispatch/tracking-api: " + field)
    assert isinstance(exc.value, InputError)


def test_missing_required_field():
    obj = copy.deepcopy(MINIMAL)
    del obj["spec"]["workload"]
    with pytest.raises(PolicyInvalid) as exc:
        parse_policy(obj)
    assert exc.value.field == "spec.workload" and "required" in exc.value.problem


@pytest.mark.parametrize(
    "text,seconds",
    [("90s", 90), ("10m", 600), ("1h30m", 5400), ("2h", 7200), ("1h1m1s", 3661), ("120m", 7200), ("1d", 86400)],
)
def test_durations(text, seconds):
    # Prometheus duration syntax (Prometheus docs, "Querying basics" → "Time durations")
    assert parse_duration(text) == seconds


def test_zero_duration_only_where_allowed():
    assert parse_duration("0s", allow_zero=True) == 0.0
    with pytest.raises(InputError):
        parse_duration("0s")
    assert parse_policy(with_spec(cooldown="0s", settle="0m")).cooldown_s == 0.0


@pytest.mark.parametrize("text", ["", "10", "1.5h", "30m2h", "5m5m", "5M", "-5m", "1 h"])
def test_bad_durations(text):
    with pytest.raises(InputError):
        parse_duration(text)


@given(st.integers(min_value=0, max_value=10**7))
def test_duration_round_trip(seconds):
    assert parse_duration(format_duration(seconds), allow_zero=True) == seconds


def test_time_format_is_rfc3339_whole_seconds():
    t = datetime(2026, 12, 1, 22, 45, 7, 123456, tzinfo=timezone.utc)
    assert format_time(t) == "2026-12-01T22:45:07Z"
    assert parse_time("2026-12-01T22:45:07Z") == t.replace(microsecond=0)
    assert parse_time("2026-12-01T23:45:07+01:00") == t.replace(microsecond=0)
    with pytest.raises(ValueError):
        format_time(datetime(2026, 1, 1))


def test_history_round_trip_through_status():
    h = WorkloadHistory(
        last_change=T0,
        containers={"api": ContainerHistory(below_since=T0 - timedelta(minutes=30), peak_m=450), "sidecar": ContainerHistory()},
    )
    rows = [{"name": "api", "verdict": "Held", "reason": "Settling"}, {"name": "sidecar", "verdict": "Held", "reason": "InsideDeadband"}]
    status = history_to_status(h, rows)
    assert status == {
        "lastChangeTime": "2026-12-01T12:00:00Z",
        "containers": [
            {"name": "api", "verdict": "Held", "reason": "Settling",
             "belowSinceTime": "2026-12-01T11:30:00Z", "peakTarget": "450m"},
            {"name": "sidecar", "verdict": "Held", "reason": "InsideDeadband"},
        ],
    }
    back = history_from_status(status)
    assert back.last_change == T0
    assert back.container("api") == ContainerHistory(below_since=T0 - timedelta(minutes=30), peak_m=450)
    assert back.container("sidecar") == ContainerHistory()


def test_history_from_garbage_status_starts_over():
    h = history_from_status(
        {"lastChangeTime": "yesterday", "containers": [{"name": "api"}, {"name": "x", "belowSinceTime": "no", "peakTarget": "1m"},
                                                       {"name": "y", "belowSinceTime": "2026-12-01T11:30:00Z", "peakTarget": "lots"}, 7]}
    )
    assert h == WorkloadHistory()
    assert history_from_status(None) == WorkloadHistory()


def cond(status, reason="Reconciled", now=T0, gen=1):
    return make_condition(type=CONDITION_READY, status=status, reason=reason, message="m", observed_generation=gen, now=now)


def test_condition_shape():
    c = cond(True)
    # Kubernetes API conventions: type, status "True"/"False"/"Unknown", observedGeneration,
    # lastTransitionTime, reason (CamelCase), message
    assert c == {
        "type": "Ready",
        "status": "True",
        "observedGeneration": 1,
        "lastTransitionTime": "2026-12-01T12:00:00Z",
        "reason": "Reconciled",
        "message": "m",
    }
    with pytest.raises(ValueError):
        cond(True, reason="not camel case")
    with pytest.raises(ValueError):
        cond("Maybe")


def test_set_condition_keeps_transition_time_while_status_stays():
    later = T0 + timedelta(minutes=5)
    other = {"type": "Other", "status": "True", "lastTransitionTime": "2026-01-01T00:00:00Z", "reason": "X"}
    conds = set_condition([other], cond(True))
    conds2 = set_condition(conds, cond(True, reason="StillFine", now=later, gen=2))
    (ready,) = [c for c in conds2 if c["type"] == "Ready"]
    assert ready["lastTransitionTime"] == "2026-12-01T12:00:00Z"  # unchanged: status stayed True
    assert ready["reason"] == "StillFine" and ready["observedGeneration"] == 2
    conds3 = set_condition(conds2, cond(False, reason="PolicyInvalid", now=later))
    (ready,) = [c for c in conds3 if c["type"] == "Ready"]
    assert ready["lastTransitionTime"] == format_time(later)  # changed with the status
    assert [c["type"] for c in conds3] == ["Other", "Ready"]  # keyed by type, order kept, no duplicates
    assert conds3[0] == other
    assert conds == set_condition([other], cond(True))  # inputs are not mutated
    assert conds[1]["reason"] == "Reconciled"


def test_invalid_condition_says_what_is_wrong():
    with pytest.raises(PolicyInvalid) as exc:
        parse_policy(with_spec(deadbandPercent=200))
    c = invalid_condition(exc.value, observed_generation=3, now=T0)
    assert (c["type"], c["status"], c["reason"], c["observedGeneration"]) == ("Ready", "False", "PolicyInvalid", 3)
    assert c["message"].startswith("spec.deadbandPercent: ") and "not acted on" in c["message"]
