"""The review table: fixed columns, JSON keys, Markdown shape, the in-place note."""

from __future__ import annotations

import json

from ratefit.controller.review import COLUMNS, IN_PLACE_NOTE, ReviewRow, render, to_json, to_markdown, to_table
from ratefit.controller.quantity import parse_cpu


def _rows() -> list[ReviewRow]:
    return [
        ReviewRow(namespace="parcels", policy="label-printer", kind="Deployment", workload="label-printer",
                  container="app", verdict="Proposed", why=(), current_m=1000, proposed_m=500, demand_m=390,
                  upper_m=430, rate=95.25, limit_m=2000, proposed_limit_m=1000, method="Rollout"),
        ReviewRow(namespace="dispatch", policy="tracking-api", kind="Deployment", workload="tracking-api",
                  container="api", verdict="Held", why=("HorizontalConflict",), current_m=2000, rate=300.0,
                  method="InPlace"),
    ]


def test_json_has_the_fixed_keys_and_quantities_parse() -> None:
    data = json.loads(to_json(_rows()))
    assert isinstance(data, list) and len(data) == 2
    for obj in data:
        assert set(COLUMNS) <= set(obj)
    by = {o["container"]: o for o in data}
    assert by["app"]["proposed"] == "500m" and by["app"]["current"] == "1000m"
    # the quantity strings are what the Kubernetes quantity grammar accepts (our parser is
    # checked against kubernetes.utils.parse_quantity in tests/test_quantity.py)
    assert parse_cpu(by["app"]["proposed"]) == 500
    assert by["app"]["workload"] == "Deployment/label-printer"
    assert by["api"]["why"] == "HorizontalConflict" and by["api"]["proposed"] is None
    # resizing pods leaves the template as it was (Kubernetes docs, "Resize CPU and Memory
    # Resources assigned to Containers"): the review must say so
    assert IN_PLACE_NOTE in by["api"]["note"] and by["app"]["note"] == ""


def test_table_and_markdown_have_one_line_per_container() -> None:
    table = to_table(_rows())
    lines = table.strip().splitlines()
    assert lines[0].split()[:3] == ["WORKLOAD", "CONTAINER", "CURRENT"]
    assert len(lines) == 1 + 2 + 1  # header, rows, summary
    assert "parcels/Deployment/label-printer" in table and "500m" in table
    assert "new pods start at template value" in table
    md = to_markdown(_rows())
    md_rows = [ln for ln in md.splitlines() if ln.startswith("|")]
    assert md_rows[0] == "| " + " | ".join(COLUMNS) + " |"
    assert len(md_rows) == 2 + 2  # header, separator, 2 rows
    assert all(r.count("|") == len(COLUMNS) + 1 for r in md_rows)
    assert "net change of requests -500m" in md
    assert render(_rows(), "json").startswith("[")
