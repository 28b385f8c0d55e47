"""The review: fixed columns, JSON keys, Markdown shape, the message of every row, and the
totals across replicas (checked against a hand computation on the demo scenario)."""

from __future__ import annotations

import json

from ratefit.controller.review import (
    COLUMNS,
    IN_PLACE_NOTE,
    ReviewRow,
    render,
    to_json,
    to_markdown,
    to_table,
    totals,
)
from ratefit.controller.quantity import parse_cpu
from ratefit.models.scenario.services import SCENARIO


def _rows() -> list[ReviewRow]:
    return [
        ReviewRow(namespace="parcels", policy="label-printer", kind="Deployment", workload="label-printer",
                  container="app", verdict="Proposed", why=(), current_m=1000, proposed_m=500, demand_m=390,
                  upper_m=430, rate=95.25, limit_m=2000, proposed_limit_m=1000, method="Rollout", replicas=3,
                  note="lower to 500m (target 500m)"),
        ReviewRow(namespace="dispatch", policy="tracking-api", kind="Deployment", workload="tracking-api",
                  container="api", verdict="Held", why=("HorizontalConflict",), current_m=2000, rate=300.0,
                  method="InPlace", replicas=4),
    ]


def test_json_has_the_fixed_keys_and_quantities_parse() -> None:
    data = json.loads(to_json(_rows()))
    assert isinstance(data, list) and len(data) == 2
    for obj in data:
        assert set(COLUMNS) <= set(obj)
        assert "upper" not in obj and "note" not in obj  # renamed: demand_bound, message
    by = {o["container"]: o for o in data}
    assert by["app"]["proposed"] == "500m" and by["app"]["current"] == "1000m"
    assert by["app"]["demand_bound"] == "430m" and by["app"]["demand_bound_m"] == 430
    # the quantity strings are what the Kubernetes quantity grammar accepts (our parser is
    # checked against kubernetes.utils.parse_quantity in tests/test_quantity.py)
    assert parse_cpu(by["app"]["proposed"]) == 500
    assert by["app"]["workload"] == "Deployment/label-printer"
    assert by["app"]["replicas"] == 3 and by["app"]["change_per_pod_m"] == -500 and by["app"]["change_m"] == -1500
    assert by["api"]["why"] == "HorizontalConflict" and by["api"]["proposed"] is None
    assert by["api"]["change_m"] == 0  # held: nothing moves
    # resizing pods leaves the template as it was (Kubernetes docs, "Resize CPU and Memory
    # Resources assigned to Containers"): the review must say so
    assert IN_PLACE_NOTE in by["api"]["message"] and by["app"]["message"] == "lower to 500m (target 500m)"
    # a hold says in words how to release it
    assert "set allowHorizontalConflict" in by["api"]["message"]


def test_table_and_markdown_have_one_line_per_container_and_the_message() -> None:
    table = to_table(_rows())
    lines = table.strip().splitlines()
    assert lines[0].split()[:3] == ["WORKLOAD", "CONTAINER", "CURRENT"]
    assert "MESSAGE" not in lines[0]  # the message goes on its own line under the row
    i = next(n for n, ln in enumerate(lines) if ln.startswith("parcels/Deployment/label-printer"))
    assert "500m" in lines[i] and lines[i + 1].strip() == "-> lower to 500m (target 500m)"
    assert any("new pods start at the template value" in ln for ln in lines)
    md = to_markdown(_rows())
    md_rows = [ln for ln in md.split("\n\n")[0].splitlines() if ln.startswith("|")]
    assert md_rows[0] == "| " + " | ".join(COLUMNS) + " |"
    assert len(md_rows) == 2 + 2  # header, separator, 2 rows
    assert all(r.count("|") == len(COLUMNS) + 1 for r in md_rows)
    assert "| lower to 500m (target 500m) |" in md
    assert render(_rows(), "json").startswith("[")


def test_the_policy_name_is_shown_when_two_policies_name_one_workload() -> None:
    rows = [ReviewRow(namespace="shop", policy=p, kind="Deployment", workload="web", container="app",
                      verdict="held", why=("InsideDeadband",), current_m=100, proposed_m=100, replicas=2)
            for p in ("web-a", "web-b")]
    table = to_table(rows)
    assert "shop/Deployment/web[policy=web-a]" in table and "shop/Deployment/web[policy=web-b]" in table
    assert "[policy=" not in to_table(rows[:1])  # one policy: no ambiguity, no clutter


def _scenario_rows() -> list[ReviewRow]:
    """A review of the demo scenario (Kestrel Post, INVENTED): its workloads, replicas and
    current requests as models/scenario/services.py defines them; the proposals fixed here."""
    proposed = {  # (workload, container) -> (verdict, proposed millicores)
        ("label-printer", "app"): ("Proposed", 1500),
        ("label-printer", "log-shipper"): ("Held", 200),
        ("route-planner", "planner"): ("Proposed", 1000),
        ("tracking-api", "api"): ("Held", 1100),
        ("tracking-api", "cache-warmer"): ("Held", 60),
        ("address-lookup", "lookup"): ("Proposed", 1500),
        ("customs-gateway", "gateway"): ("Proposed", 505),
    }
    rows = []
    for s in SCENARIO:
        for c in s.containers:
            verdict, prop = proposed[(s.workload, c.name)]
            rows.append(ReviewRow(namespace=s.namespace, policy=s.workload, kind=s.kind, workload=s.workload,
                                  container=c.name, verdict=verdict, why=("NewTarget",) if verdict == "Proposed"
                                  else ("InsideDeadband",), current_m=c.request_m, proposed_m=prop,
                                  replicas=s.replicas))
    return rows


def test_totals_match_a_hand_computation_on_the_demo_scenario() -> None:
    """Hand computation (replicas × per-pod change), from the scenario's table in
    models/scenario/__init__.py: label-printer 3 × (6000+200)m, route-planner 2 × 500m,
    tracking-api 2 × (1100+60)m, address-lookup 2 × 6000m, customs-gateway 3 × 250m."""
    t = totals(_scenario_rows())
    by = {w.workload: w for w in t.workloads}
    # label-printer: 3 replicas, app 6000m -> 1500m: per pod -4500m, all pods -13500m
    assert (by["label-printer"].now_m, by["label-printer"].after_m) == (3 * 6200, 3 * 1700)
    assert (by["label-printer"].change_per_pod_m, by["label-printer"].change_m) == (-4500, -13500)
    # route-planner: 2 replicas, 500m -> 1000m: +500m per pod, +1000m in all
    assert (by["route-planner"].change_per_pod_m, by["route-planner"].change_m) == (500, 1000)
    # tracking-api: held, 2 × 1160m stays
    assert (by["tracking-api"].now_m, by["tracking-api"].after_m) == (2320, 2320)
    # address-lookup: 2 × (6000m -> 1500m) = -9000m; customs-gateway: 3 × (250m -> 505m) = +765m
    assert by["address-lookup"].change_m == -9000 and by["customs-gateway"].change_m == 765
    # in total: now 18600 + 1000 + 2320 + 12000 + 750 = 34670m;
    # change -13500 + 1000 + 0 - 9000 + 765 = -20735m; after 13935m
    assert (t.now_m, t.change_m, t.after_m) == (34670, -20735, 13935)
    table = to_table(_scenario_rows())
    assert "34.670 -> 13.935 cores (-20.735)" in table  # the summary line
    total_line = next(ln for ln in table.splitlines() if ln.startswith("total"))
    assert total_line.split()[1:5] == ["12", "34.670", "13.935", "-20.735"]  # 3+2+2+2+3 replicas
    md = to_markdown(_scenario_rows())
    assert "| parcels/Deployment/label-printer | 3 | 18.600 | 5.100 | -13.500 | -4500m |" in md


def test_rows_without_replicas_are_left_out_of_the_totals_and_said_so() -> None:
    rows = [ReviewRow(namespace="shop", policy="web", kind="Deployment", workload="web", container="app",
                      verdict="held", why=("WorkloadNotFound",), note="shop/Deployment/web not found")]
    t = totals(rows)
    assert t.workloads == () and t.unknown_rows == 1
    assert "1 containers left out" in to_table(rows)


def test_every_verdict_spelling_moves_the_totals() -> None:
    """The verdict values may be written changed or Changed (the status's CamelCase)."""
    for verdict in ("changed", "Changed", "Proposed"):
        r = ReviewRow(namespace="a", policy="p", kind="Deployment", workload="w", container="c", verdict=verdict,
                      current_m=100, proposed_m=150, replicas=2)
        assert r.change_m == 100
