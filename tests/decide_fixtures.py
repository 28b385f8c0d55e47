"""Helpers shared by the tests/test_decide_*.py files: build policies through the real
parser and run one decision with readable defaults."""

from __future__ import annotations

import copy
from datetime import datetime, timezone
from typing import Any

from ratefit.controller.decide import ContainerInput, Sizing, WorkloadDecision, decide_workload
from ratefit.controller.limits import BudgetView
from ratefit.controller.policy import Policy, WorkloadHistory, parse_policy

NOW = datetime(2026, 12, 1, 12, 0, tzinfo=timezone.utc)

BASE: dict[str, Any] = {
    "apiVersion": "ratefit.dev/v1alpha1",
    "kind": "SizingPolicy",
    "metadata": {"name": "label-printer", "namespace": "parcels", "generation": 1},
    "spec": {
        "workload": {"kind": "Deployment", "name": "label-printer"},
        "mode": "Apply",
        "containers": [{"name": "app", "model": "parcels/label-printer/app"}],
    },
}


def make_policy(container: dict[str, Any] | None = None, **spec: Any) -> Policy:
    obj = copy.deepcopy(BASE)
    obj["spec"].update(spec)
    if container:
        obj["spec"]["containers"][0].update(container)
    return parse_policy(obj)


def decide_one(
    policy: Policy,
    *,
    request: int | None,
    limit: int | None = None,
    rate: float | None = 10.0,
    upper: float | None = 0.4,
    demand: float | None = None,
    extrapolated: bool = False,
    history: WorkloadHistory = WorkloadHistory(),
    now: datetime = NOW,
    budget: BudgetView = BudgetView(),
    hpa_on_cpu: bool = False,
    dry_run: bool = False,
) -> WorkloadDecision:
    sizing = None if upper is None else Sizing(demand=upper * 0.8 if demand is None else demand, upper=upper, extrapolated=extrapolated)
    return decide_workload(
        policy,
        [ContainerInput("app", request, limit, rate, sizing)],
        history=history,
        now=now,
        budget=budget,
        hpa_on_cpu=hpa_on_cpu,
        dry_run=dry_run,
    )
