"""The CLI of the learning pipeline: `ratefit train`, `models list/show`, `predict`,
`report`, from CSV files, a directory of the invented scenario's CSVs, and the real
Prometheus server over HTTP (history backfilled with promtool)."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest

from ratefit.controller.cli import main
from ratefit.models.store import ModelStore

KEY = "shop/web/app"


def _csv(path: Path, n: int = 600, *, seed: int = 0, throttled_every: int = 10) -> Path:
    rng = np.random.default_rng(seed)
    t0 = 1_767_000_000
    lines = ["timestamp,pod,rate,cpu,throttled"]
    for i in range(n):
        pod = f"web-{i % 3}"
        r = rng.uniform(2, 60)
        cpu = 0.05 + 0.0004 * r**2 + rng.normal(0, 0.02)
        thr = 0.4 if i % throttled_every == 0 else 0.0
        lines.append(f"{t0 + 30 * (i // 3)},{pod},{r:.4f},{max(cpu, 0):.5f},{thr}")
    path.write_text("\n".join(lines) + "\n")
    return path


def _run(capsys, *argv: str) -> tuple[int, str, str]:
    rc = main(list(argv))
    out, err = capsys.readouterr()
    return rc, out, err


@pytest.fixture
def trained(tmp_path: Path, capsys) -> tuple[Path, Path]:
    csv = _csv(tmp_path / "web.csv")
    store = tmp_path / "store"
    rc, out, err = _run(capsys, "train", "--samples", str(csv), "--key", KEY, "--store", str(store),
                        "--report", str(tmp_path / "rep"))
    assert rc == 0, err
    assert "fold 5/5" in err  # progress per candidate and fold on stderr
    assert KEY in out
    return store, tmp_path


def test_train_show_json_fields(trained, capsys) -> None:
    store, tmp = trained
    rc, out, _ = _run(capsys, "models", "show", KEY, "--store", str(store), "--output", "json")
    assert rc == 0
    d = json.loads(out)
    assert {"model", "chosen", "cv", "rate_range", "coverage", "samples", "dropped"} <= d.keys()
    assert d["model"] == KEY and d["coverage"] == 0.95
    assert all({"model", "rmse", "mae"} <= row.keys() for row in d["cv"])
    assert {row["model"] for row in d["cv"]} >= {"fixed", "linear", "isotonic", "mlp"}
    assert d["chosen"] in {row["model"] for row in d["cv"]}
    lo, hi = d["rate_range"]
    assert 2 <= lo < hi <= 60
    # every 10th sample was throttled (40% of periods): dropped and counted, 5 min warm-up per pod
    assert d["dropped"]["throttled"] == 60
    assert d["samples"] == 600 - sum(d["dropped"].values())
    assert d["dropped"]["warmup"] > 0
    rc, out, _ = _run(capsys, "models", "show", KEY, "--store", str(store))
    assert rc == 0 and "chosen" in out and "RMSE" in out


def test_report_written(trained) -> None:
    _, tmp = trained
    md = (tmp / "rep" / "shop__web__app.md").read_text()
    assert "| estimator | RMSE | MAE | p95 abs error |" in md and "![demand curve" in md
    png = (tmp / "rep" / "shop__web__app.png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n" and len(png) > 20_000


def test_models_list(trained, capsys) -> None:
    store, _ = trained
    rc, out, _ = _run(capsys, "models", "list", "--store", str(store), "--output", "json")
    assert rc == 0
    d = json.loads(out)
    assert [m["model"] for m in d["models"]] == [KEY] and d["refused"] == {}
    rc, out, _ = _run(capsys, "models", "list", "--store", str(store))
    assert KEY in out and "ESTIMATOR" in out


def test_predict_equals_curve_lookup_rounded_up(trained, capsys) -> None:
    store, _ = trained
    curve = ModelStore(store).load(KEY).demand_curve()
    for rate in (curve.rate_lo, 17.5, curve.rate_hi, 80.0):
        rc, out, _ = _run(capsys, "predict", "--store", str(store), "--key", KEY, "--rate", str(rate), "--output", "json")
        assert rc == 0
        d = json.loads(out)
        ref = curve.lookup(np.array([rate]))
        # millicores rounded up: 1m is Kubernetes' CPU precision (Kubernetes docs, "Resource units")
        assert d["demand_m"] == math.ceil(round(float(ref.demand[0]) * 1000, 6))
        assert d["demand_bound_m"] == math.ceil(round(float(ref.upper[0]) * 1000, 6))
        assert d["extrapolated"] is bool(ref.extrapolated[0])
        assert isinstance(d["demand_m"], int) and d["demand_bound_m"] >= d["demand_m"]
    assert d["extrapolated"] is True  # 80 req/s lies above the trained range


def test_errors_exit_2_with_message(tmp_path: Path, capsys) -> None:
    bad = tmp_path / "bad.csv"
    bad.write_text("rate,cpu\n1,0.1\nfast,0.2\n")
    rc, _, err = _run(capsys, "train", "--samples", str(bad), "--key", KEY, "--store", str(tmp_path / "s"))
    assert rc == 2 and f"{bad}:3: rate: 'fast' is not a number" in err
    rc, _, err = _run(capsys, "predict", "--store", str(tmp_path / "s"), KEY, "--rate", "1")
    assert rc == 2 and "no such directory" in err  # the store is missing, not the model
    (tmp_path / "s").mkdir()
    rc, _, err = _run(capsys, "predict", "--store", str(tmp_path / "s"), "--key", KEY, "--rate", "1")
    assert rc == 2 and "no model for" in err
    rc, _, err = _run(capsys, "train", "--samples", str(bad), "--store", str(tmp_path / "s"))
    assert rc == 2 and "model key NAMESPACE/WORKLOAD/CONTAINER is required" in err
    rc, _, err = _run(capsys, "train", "--samples", str(_csv(tmp_path / "ok.csv", 100)), "--key", "Bad/Key",
                      "--store", str(tmp_path / "s"))
    assert rc == 2 and "namespace/workload/container" in err


def test_samples_dir_from_scenario(tmp_path: Path, capsys) -> None:
    from ratefit.models.scenario import write_csv

    paths = write_csv(tmp_path / "samples", hours=4, services=["label-printer"])
    store = tmp_path / "store"
    rc, out, err = _run(capsys, "train", "--samples-dir", str(tmp_path / "samples"), "--store", str(store), "--quiet")
    assert rc == 0, err
    assert err == ""
    assert ModelStore(store).keys() == sorted(paths)
    # the invented label printer's app is linear (see models/scenario): the simplest fit wins
    assert ModelStore(store).load("parcels/label-printer/app").chosen in {"linear", "polynomial", "isotonic"}


@pytest.mark.prometheus
def test_train_from_real_prometheus(scenario_prometheus, tmp_path: Path, capsys) -> None:
    from ratefit.models.durations import format_duration
    from ratefit.models.scenario import queries, service

    key = "parcels/route-planner/planner"
    q = queries(key)
    h = scenario_prometheus
    store = tmp_path / "store"
    rc, out, err = _run(
        capsys, "train", "--prometheus", h.url, "--rate-query", q.rate, "--cpu-query", q.cpu,
        "--throttle-query", q.throttle, "--key", key, "--store", str(store),
        "--lookback", format_duration(h.end - h.start), "--step", "30s", "--end", str(h.end),
    )
    assert rc == 0, err
    art = ModelStore(store).load(key)
    assert art.window.source == f"prometheus:{h.url}" and art.window.step == "30s"
    assert art.samples > 500
    # throttled samples dropped: as many as Prometheus itself reports above 5% of periods,
    # counted here from a direct range query of the throttle expression (its 0/0 NaN = none)
    from ratefit.models.prometheus import PrometheusClient

    with PrometheusClient(h.url) as client:
        start = h.end - float(int(h.end - h.start))
        thr = client.query_range(q.throttle, start=start, end=h.end, step=30)
        cpu = client.query_range(q.cpu, start=start, end=h.end, step=30)
        rate = client.query_range(q.rate, start=start, end=h.end, step=30)
    have = lambda series: {(s.labels["pod"], t) for s in series for t in s.timestamps.tolist()}  # noqa: E731
    joined = have(cpu) & have(rate)
    over = {(s.labels["pod"], t) for s in thr for t, v in zip(s.timestamps.tolist(), s.values.tolist()) if v > 0.05}
    assert art.dropped["throttled"] == len(over & joined)
    assert art.samples_total == len(joined)
    assert art.chosen != "fixed"
    # the learned curve follows the scenario's own true curve inside the trained range
    truth = next(c.truth for c in service(key).containers if c.name == "planner")
    lo, hi = art.rate_range
    rates = np.linspace(lo + 0.2 * (hi - lo), hi - 0.2 * (hi - lo), 5)
    got = art.demand_curve().lookup(rates).demand
    assert np.allclose(got, truth(rates), rtol=0.15), (got, truth(rates))


def test_report_command_from_store(trained, tmp_path: Path, capsys) -> None:
    store, tmp = trained
    rc, out, err = _run(capsys, "report", KEY, "--store", str(store), "--out", str(tmp_path / "r2"),
                        "--samples", str(tmp / "web.csv"))
    assert rc == 0, err
    md = (tmp_path / "r2" / "shop__web__app.md").read_text()
    art = ModelStore(store).load(KEY)
    assert f"**{art.chosen}**" in md and f"{art.samples} used of {art.samples_total}" in md
    assert (tmp_path / "r2" / "shop__web__app.png").stat().st_size > 20_000


def test_bad_options(tmp_path: Path, capsys) -> None:
    csv = str(_csv(tmp_path / "w.csv", 100))
    rc, _, err = _run(capsys, "train", "--samples", csv, "--key", KEY, "--store", str(tmp_path), "--coverage", "1.5")
    assert rc == 2 and "coverage" in err
    rc, _, err = _run(capsys, "train", "--samples", csv, "--key", KEY, "--store", str(tmp_path), "--warmup", "soon")
    assert rc == 2 and "--warmup" in err
    rc, _, err = _run(capsys, "train", "--samples", csv, "--samples-dir", str(tmp_path), "--store", str(tmp_path))
    assert rc == 2 and "exactly one" in err


def test_prometheus_unreachable_is_a_clear_error(closed_port_url: str, tmp_path: Path, capsys) -> None:
    rc, _, err = _run(capsys, "train", "--prometheus", closed_port_url, "--rate-query", "up", "--cpu-query", "up",
                      "--key", KEY, "--store", str(tmp_path), "--window", "1h", "--timeout", "2")
    assert rc == 2 and "ratefit train: error:" in err and "127.0.0.1" in err
    assert not (tmp_path / "shop").exists()
    rc, _, err = _run(capsys, "train", "--prometheus", closed_port_url, "--rate-query", "up",
                      "--key", KEY, "--store", str(tmp_path))
    assert rc == 2 and "--cpu-query" in err
