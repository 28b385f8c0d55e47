"""The per-pod capacity in the model (issue 14): an optional top-level key of the artifact,
inside the content hash, shown by ``describe()`` and the sizing API's model detail, set by
``ratefit train --capacity R`` or ``--profile FILE.json`` (the saved ``ratefit profile
--output json``). And the HPA converter of the Kubernetes adapter (autoscaling/v2 API
reference: MetricSpec types Resource/ContainerResource/Pods/Object/External, MetricTarget
types Utilization/AverageValue/Value, quantities as in the "Quantity" reference)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from api_fixtures import make_artifact
from ratefit.controller.cli import main
from ratefit.controller.hpa_sizing import ModelFacts, autoscaler_view, curve_grid
from ratefit.controller.kube import _hpa
from ratefit.models.store import ArtifactRefused, ModelStore, content_hash, parse_artifact

KEY = "shop/web/app"


def test_capacity_is_optional_hashed_and_described(tmp_path: Path) -> None:
    plain = make_artifact(KEY)
    body = plain.to_json_dict()
    assert "capacity" not in body  # absent unless measured: older files read as before
    assert parse_artifact(json.dumps(body)).capacity is None
    assert plain.describe()["capacity"] is None

    with_cap = plain.with_capacity(120.0)
    assert with_cap.capacity == 120.0 and with_cap.content_hash != plain.content_hash
    assert with_cap.describe()["capacity"] == 120.0
    path = ModelStore(tmp_path).save(with_cap)
    raw = json.loads(path.read_text())
    assert raw["capacity"] == 120.0
    assert ModelStore(tmp_path).load(KEY).capacity == 120.0
    # the hash covers it: an edited capacity is refused
    raw["capacity"] = 500.0
    with pytest.raises(ArtifactRefused, match="content hash mismatch"):
        parse_artifact(json.dumps(raw))
    # a sealed but absurd capacity is refused by the schema
    for bad in (0.0, -5.0, 2e9):
        raw["capacity"] = bad
        raw["content_hash"] = content_hash({k: v for k, v in raw.items() if k != "content_hash"})
        with pytest.raises(ArtifactRefused, match="capacity"):
            parse_artifact(json.dumps(raw))


def _csv(path: Path, n: int = 200) -> Path:
    rng = np.random.default_rng(3)
    lines = ["rate,cpu"]
    for _ in range(n):
        r = rng.uniform(5, 150)
        lines.append(f"{r:.3f},{0.02 + 0.003 * r + rng.normal(0, 0.005):.5f}")  # invented samples
    path.write_text("\n".join(lines) + "\n")
    return path


def test_train_records_the_capacity(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    csv = _csv(tmp_path / "s.csv")
    store = tmp_path / "store"
    assert main(["train", "--samples", str(csv), "--key", KEY, "--store", str(store), "--quiet",
                 "--folds", "3", "--capacity", "140"]) == 0
    assert ModelStore(store).load(KEY).capacity == 140.0
    # from a saved profile (the JSON ratefit profile --output json prints)
    prof = tmp_path / "profile.json"
    prof.write_text(json.dumps({"steps": [], "capacity": 95.5, "slope": 0.003, "intercept": 0.02, "r2": 0.99}))
    assert main(["train", "--samples", str(csv), "--key", KEY, "--store", str(store), "--quiet",
                 "--folds", "3", "--profile", str(prof)]) == 0
    assert ModelStore(store).load(KEY).capacity == 95.5
    capsys.readouterr()
    # bad input: one line that says what is wrong
    for argv, words in (
        (["--capacity", "0"], "--capacity 0"),
        (["--capacity", "10", "--profile", str(prof)], "not both"),
        (["--profile", str(csv)], "not JSON"),
    ):
        assert main(["train", "--samples", str(csv), "--key", KEY, "--store", str(store), "--quiet", *argv]) != 0
        err = capsys.readouterr().err
        assert words in err, err


def _hpa_obj(metrics: object, **spec: object) -> dict[str, object]:
    return {"metadata": {"namespace": "shop", "name": "web"},
            "spec": {"scaleTargetRef": {"kind": "Deployment", "name": "web"}, "maxReplicas": 10,
                     "metrics": metrics, **spec},
            "status": {"currentReplicas": 3}}


def test_hpa_converter_reads_every_metric_type() -> None:
    h = _hpa(_hpa_obj([
        {"type": "Pods", "pods": {"metric": {"name": "http_requests"}, "target": {"type": "AverageValue", "averageValue": "100"}}},
        {"type": "Object", "object": {"metric": {"name": "rps"}, "describedObject": {"kind": "Ingress", "name": "x"},
                                      "target": {"type": "AverageValue", "averageValue": "1500m"}}},
        {"type": "External", "external": {"metric": {"name": "queue"}, "target": {"type": "Value", "value": "2k"}}},
        {"type": "Resource", "resource": {"name": "cpu", "target": {"type": "Utilization", "averageUtilization": 70}}},
        {"type": "ContainerResource", "containerResource": {"name": "cpu", "container": "app",
                                                            "target": {"type": "Utilization", "averageUtilization": 60}}},
    ], minReplicas=2, behavior={"scaleUp": {"tolerance": "50m"}}))
    got = [(m.source, m.name, m.target_type, m.average_value, m.value, m.utilization, m.container) for m in h.metrics]
    assert got == [
        ("Pods", "http_requests", "AverageValue", 100.0, None, None, None),
        ("Object", "rps", "AverageValue", 1.5, None, None, None),  # "1500m" = 1.5 (Quantity reference)
        ("External", "queue", "Value", None, 2000.0, None, None),
        ("Resource", "cpu", "Utilization", None, None, 70.0, None),
        ("ContainerResource", "cpu", "Utilization", None, None, 60.0, "app"),
    ]
    assert (h.min_replicas, h.max_replicas, h.current_replicas, h.tolerance) == (2, 10, 3, 0.05)
    # no metrics: the API's default, 80 % average CPU utilisation (API reference)
    d = _hpa(_hpa_obj(None))
    assert d.scales_on_cpu_utilization and d.metrics[0].utilization == 80.0 and d.tolerance == 0.1


def test_hpa_converter_survives_malformed_fields() -> None:
    """One odd field never breaks the read of the autoscaler (or of the others)."""
    h = _hpa(_hpa_obj([
        {"type": "Pods", "pods": {"metric": {"name": "ok"}, "target": {"type": "AverageValue", "averageValue": "10"}}},
        {"type": "Pods", "pods": {"metric": {"name": "bad"}, "target": {"type": "AverageValue", "averageValue": "ten"}}},
        {"type": "Pods", "pods": "not an object"},
        {"type": "Mystery", "mystery": {}},
        "not a metric",
    ], minReplicas="two", behavior={"scaleUp": {"tolerance": "NaN"}}))
    assert [(m.name, m.average_value) for m in h.metrics] == [("ok", 10.0), ("bad", None)]
    assert h.min_replicas is None and h.tolerance == 0.1
    # the malformed Pods metric still counts as a Pods metric: with two and no name nothing is assumed
    view = autoscaler_view([h], metric_name=None, workload_replicas=3)
    assert view is not None and view.rate_target is None and "several Pods metrics" in view.note
    assert autoscaler_view([h], metric_name="ok", workload_replicas=3).rate_target.target == 10.0  # type: ignore[union-attr]


def test_curve_points_interpolate_and_extrapolate() -> None:
    grid = curve_grid(0.0, 200.0)
    assert len(grid) == 32 and grid[0] == 0.0 and grid[-1] == 200.0
    f = ModelFacts(rate_lo=0.0, rate_hi=200.0, rates=grid, demand=tuple(0.05 + 0.004 * r for r in grid))
    for r in (0.0, 3.3, 100.0, 199.9, 210.0):  # linear: exact inside, the last slope above
        assert f(r) == pytest.approx(0.05 + 0.004 * r)
    assert f(-5.0) == pytest.approx(0.05)  # flat below


def test_facts_from_a_stored_curve_match_the_sizing_api_grid() -> None:
    from ratefit.controller.hpa_sizing import facts_from_curve

    art = make_artifact(KEY, base=0.05, slope=0.004).with_capacity(120.0)
    f = facts_from_curve(art.demand_curve(), capacity=art.capacity)
    assert f.capacity == 120.0 and (f.rate_lo, f.rate_hi) == (0.0, 200.0) and len(f.rates) == 32
    assert f(100.0) == pytest.approx(0.05 + 0.004 * 100.0)
