"""A release that makes each request cost 40 % more CPU (INVENTED Kestrel Post scenario),
end to end with real parts: the real Prometheus (history backfilled with promtool), a real
`ratefit serve`, the sandbox API server, `ratefit plan`, `ratefit run --once` and
`ratefit models rollback` as subprocesses.

History (INVENTED): Deployment parcel-router in namespace kestrel-post, 3 pods, 14 h at 30 s
steps ending 5 min before now; per-pod rate 10 ± 5 req/s on a 4 h cycle; CPU (cores) =
0.05 + 0.02 × rate before the release, × 1.4 after it; the release is 6 h before the end.
The first model is trained on the 8 h before the release through the retrain path
(``models.train.train_from_prometheus``, as ``ratefit train`` does).

Checks (issue 13, "Tests"):
- one `ratefit plan` with six hours of post-release history marks the container stale
  (reason ModelStale, exceedance ratio in the message) and holds the decrease the old curve
  asks for; a plan at the release time (no post-release history) does not;
- `ratefit run --once --retrain-store …` (policy ``retrain: Auto``; the staleness check is on
  by default with --prometheus, window 6 h)
  retrains from the samples since the change point, keeps the old version, reloads the API,
  writes the ModelFresh=False condition and a Warning Event; the next plan's proposal is
  within 10 % of the new truth's target: ceil5((1.4 × (0.05 + 0.02 × rate)) × 1.15) — the
  truth at the plan's rate plus headroom (DESIGN.md "One decision", step 3);
- the retrained model records the image; a Deployment now running another image is marked stale;
- `ratefit models rollback` restores the old model and the API serves it after a reload.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
import time
from pathlib import Path

import httpx
import numpy as np
import pytest

from api_fixtures import serve_process
from reconcile_fixtures import CRD, policy
from ratefit.controller.quantity import parse_cpu
from ratefit.controller.rate_presets import template_for
from ratefit.controller.retrain import Retrainer, RetrainJob
from ratefit.models.candidates import get_candidates
from ratefit.models.options import TrainOptions
from ratefit.models.prometheus import PrometheusClient
from ratefit.models.store import ModelStore

pytestmark = [pytest.mark.prometheus, pytest.mark.slow]

RATEFIT = Path(sys.executable).with_name("ratefit")
NS, WL, C = "kestrel-post", "parcel-router", "app"
KEY = f"{NS}/{WL}/{C}"
METRIC = "kestrel_http_requests_total"
PODS = ("parcel-router-6f7d9c8b4-x2k9p", "parcel-router-6f7d9c8b4-q7m4t", "parcel-router-6f7d9c8b4-z5r8n")
HOURS, STEP, RELEASE_BEFORE_END = 14, 30, 6 * 3600
HEADROOM = 0.15
FACTOR = 1.4


def truth(rate: float) -> float:
    return 0.05 + 0.02 * rate


def write_history(path: Path, end: float) -> tuple[float, float]:
    """Counters in OpenMetrics text (``promtool tsdb create-blocks-from openmetrics``)."""
    rng = np.random.default_rng(13)
    n = int(HOURS * 3600 / STEP)
    t = end - (n - 1) * STEP + np.arange(n) * STEP
    release = end - RELEASE_BEFORE_END
    lines_req, lines_cpu = [], []
    for i, pod in enumerate(PODS):
        rate = np.clip(10 + 5 * np.sin(2 * np.pi * (t / (4 * 3600.0)) + i) + rng.normal(0, 0.3, n), 0.5, None)
        cpu = np.where(t >= release, FACTOR, 1.0) * truth(rate) + rng.normal(0, 0.01, n)
        req_c = np.cumsum(rate * STEP)
        cpu_c = np.cumsum(np.clip(cpu, 0.0, None) * STEP)
        for ts, v in zip(t, req_c):
            lines_req.append(f'{METRIC}{{namespace="{NS}",pod="{pod}"}} {v:.3f} {ts:.0f}')
        for ts, v in zip(t, cpu_c):
            lines_cpu.append(f'container_cpu_usage_seconds_total{{container="{C}",namespace="{NS}",pod="{pod}"}} '
                             f'{v:.4f} {ts:.0f}')
    with open(path, "w") as f:
        f.write(f"# HELP {METRIC} INVENTED requests served.\n# TYPE {METRIC} counter\n")
        f.write("\n".join(lines_req) + "\n")
        f.write("# HELP container_cpu_usage_seconds_total INVENTED cAdvisor CPU seconds.\n"
                "# TYPE container_cpu_usage_seconds_total counter\n")
        f.write("\n".join(lines_cpu) + "\n# EOF\n")
    return float(t[0]), release


def deployment() -> dict:
    return {"apiVersion": "apps/v1", "kind": "Deployment",
            "metadata": {"name": WL, "namespace": NS, "labels": {"app.kubernetes.io/name": WL}},
            "spec": {"replicas": 3, "selector": {"matchLabels": {"app.kubernetes.io/name": WL}},
                     "template": {"metadata": {"labels": {"app.kubernetes.io/name": WL}},
                                  "spec": {"containers": [{"name": C, "image": "registry.kestrel-post.example/parcel-router:2.0.0",
                                                           "resources": {"requests": {"cpu": "1", "memory": "256Mi"}}}]}}}}


def flags(kc: Path, prom: str, api: str, at: float) -> list[str]:
    return ["--kubeconfig", str(kc), "--prometheus", prom, "--rate-metric", METRIC, "--rate-at", f"{at:.3f}",
            "--sizing-api", api, "--timeout", "60"]  # the staleness check is on by default (6 h window)


def plan(kc: Path, prom: str, api: str, at: float) -> dict:
    p = subprocess.run([str(RATEFIT), "plan", *flags(kc, prom, api, at), "--output", "json"],
                       capture_output=True, text=True, timeout=300)
    assert p.returncode == 0, p.stderr
    rows = json.loads(p.stdout)
    assert len(rows) == 1
    return rows[0]


def in_process_ratio(kc: Path, prom: str, api: str, at: float) -> float:
    """Dry-run passes in this process (same parts as `ratefit plan`, staleness check on);
    the value of ratefit_controller_band_exceedance_ratio for the container. The judgement
    memo (``controller/stale_memo``) with a clock of our own: a second pass within the
    re-judge interval sends no usage query and carries the verdict; after it, one more
    judgement (two range queries)."""
    from ratefit.controller.kube import KubeAdapter
    from ratefit.controller.metrics_source import PrometheusRateSource
    from ratefit.controller.reconcile import ReconcileConfig, Reconciler
    from ratefit.controller.sizing_client import SizingClient
    from ratefit.controller.telemetry import Telemetry
    from ratefit.controller.stale_memo import JudgementMemo
    from ratefit.controller.usage_source import ModelFacts, PrometheusUsageSource

    template = template_for("http-requests-total", metric=METRIC)
    clock = [1000.0]
    memo = JudgementMemo(every_s=600, clock=lambda: clock[0])
    labels = {"workload_namespace": NS, "workload": f"Deployment/{WL}", "workload_container": C}
    with PrometheusClient(prom, timeout=60) as client, SizingClient(api, timeout=60) as sizing:
        kube = KubeAdapter.from_environment(str(kc))
        tel = Telemetry()
        usage = PrometheusUsageSource(client, template=template, at=at, facts=ModelFacts(sizing), memo=memo)
        rec = Reconciler(kube=kube, rates=PrometheusRateSource(client, at=at, template=template), sizing=sizing,
                         usage=usage, config=ReconcileConfig(dry_run=True, write=False), telemetry=tel)
        ratios = []
        for advance, queries in ((0, 2), (300, 0), (301, 2)):  # judged; carried (5 min later); judged (10 min 1 s)
            clock[0] += advance
            sent = usage.queries_sent
            result = rec.run_pass()
            assert usage.queries_sent - sent == queries, advance
            assert [r.why for r in result.rows] == [("ModelStale",)]
            assert tel.value("ratefit_controller_models_stale") == 1.0
            ratios.append(tel.value("ratefit_controller_band_exceedance_ratio", labels))
        assert ratios[0] == ratios[1] == ratios[2]

        # as `ratefit run` does it: the judgement on the background judge's thread, never in
        # the pass — the first pass hands the container over and holds nothing for staleness;
        # once the judge is done, the next pass carries its verdict
        from ratefit.controller.stale_memo import BackgroundJudge

        with SizingClient(api, timeout=60) as own_sizing:
            judge = BackgroundJudge(sizing=own_sizing)
            usage = PrometheusUsageSource(client, template=template, at=at, facts=ModelFacts(sizing),
                                          memo=JudgementMemo(every_s=600, clock=lambda: clock[0]))
            usage.background = judge
            rec = Reconciler(kube=kube, rates=PrometheusRateSource(client, at=at, template=template), sizing=sizing,
                             usage=usage, config=ReconcileConfig(dry_run=True, write=False), telemetry=Telemetry())
            first = rec.run_pass()
            assert [r.why for r in first.rows] != [("ModelStale",)]
            assert judge.wait(120) and judge.done == 1
            again = rec.run_pass()
            assert [r.why for r in again.rows] == [("ModelStale",)]
            assert usage.queries_sent == 2  # judged once, on the judge's thread
            judge.stop()
        return ratios[0]


def test_release_marks_stale_retrains_and_rolls_back(prometheus_from_openmetrics, tmp_path: Path) -> None:
    end = time.time() - 300
    start, release = write_history(tmp_path / "history.om", end)
    prom = prometheus_from_openmetrics(tmp_path / "history.om")
    store = ModelStore(tmp_path / "store")
    # the first model: the 8 h before the release, through the same training path as retraining
    quick = TrainOptions(candidates=tuple(get_candidates(["fixed", "linear", "isotonic"])))
    with PrometheusClient(prom.url, timeout=60) as client:
        template = template_for("http-requests-total", metric=METRIC, interval="2m")
        first = Retrainer(client=client, store=store, options=quick, template=template).run(
            RetrainJob(model=KEY, namespace=NS, workload_kind="Deployment", workload=WL, container=C,
                       start=start + 600, end=release))
    assert first.artifact is not None, first.error
    v1 = first.artifact.version

    from ratefit.controller.sandbox import SandboxServer

    sb = SandboxServer(host="127.0.0.1", port=0, load=[CRD]).start()
    try:
        sb.create(deployment())
        sb.create(policy(NS, WL, workload=WL, mode="DryRun", containers=[{"name": C, "model": KEY, "floor": "10m"}],
                         headroomPercent=round(HEADROOM * 100), deadbandPercent=10, settle="0s", retrain="Auto", allowExtrapolation=True))
        kc = sb.write_kubeconfig(tmp_path / "kubeconfig")
        with serve_process(store.root, workdir=tmp_path) as api:
            # before the release: the model holds, the decrease is proposed
            before = plan(kc, prom.url, api.base_url, release - 60)
            assert before["why"] != "ModelStale", before
            assert before["verdict"] == "Proposed" and before["proposed_m"] < 1000, before

            # six hours after it: stale, the decrease is held
            row = plan(kc, prom.url, api.base_url, end)
            assert (row["verdict"], row["why"]) == ("Held", "ModelStale"), row
            assert "exceedance ratio" in row["message"] and row["proposed_m"] == 1000
            ratio = float(row["message"].split("exceedance ratio ")[1].split()[0])
            assert ratio > 0.5, row["message"]
            # the same pass in process: the per-container gauge carries the ratio
            assert in_process_ratio(kc, prom.url, api.base_url, end) == pytest.approx(ratio, abs=1e-3)

            # automatic retraining (policy retrain: Auto) in one controller pass
            p = subprocess.run([str(RATEFIT), "run", "--once", "--no-leader-election", "--metrics-port", "-1",
                                *flags(kc, prom.url, api.base_url, end), "--retrain-store", str(store.root),
                                "--budget-per-minute", "0", "--max-rollouts", "0"],
                               capture_output=True, text=True, timeout=900)
            assert p.returncode == 0, p.stderr
            assert f"retrained {KEY}: version" in p.stderr, p.stderr[-3000:]
            v2 = store.load(KEY).version
            assert v2 != v1 and [a.version for _, a in store.versions(KEY)] == [v1]
            window = store.load(KEY).window
            assert window.start is not None and "automatic retrain" in window.source
            # the status says ModelFresh False / ModelStale, and a Warning Event was emitted
            pol = httpx.get(f"{sb.url}/apis/ratefit.dev/v1alpha1/namespaces/{NS}/sizingpolicies/{WL}", timeout=10).json()
            conds = {c["type"]: c for c in pol["status"]["conditions"]}
            assert conds["ModelFresh"]["status"] == "False" and conds["ModelFresh"]["reason"] == "ModelStale"
            events = httpx.get(f"{sb.url}/apis/events.k8s.io/v1/events", timeout=10).json()["items"]
            assert any(e.get("reason") == "ModelStale" and e.get("type") == "Warning" for e in events)

            # the API serves the new version (the retrainer reloaded it); the proposal follows the new truth
            served = httpx.get(f"{api.base_url}/v1/models/{KEY}", timeout=10).json()
            assert served["version"] == v2
            after = plan(kc, prom.url, api.base_url, end)
            assert after["why"] != "ModelStale", after
            want = math.ceil(FACTOR * truth(after["rate"]) * (1 + HEADROOM) * 1000 / 5 - 1e-9) * 5
            assert abs(after["proposed_m"] - want) <= 0.10 * want, (after, want)
            print(f"stale ratio {ratio:.3f}; after retraining proposed {after['proposed_m']}m, new truth {want}m, "
                  f"old curve {before['proposed_m']}m")

            # the new model records the image it was trained on; a new image marks it stale again
            assert store.load(KEY).image == "registry.kestrel-post.example/parcel-router:2.0.0"
            patch = {"spec": {"template": {"spec": {"containers": [
                {"name": C, "image": "registry.kestrel-post.example/parcel-router:2.1.0"}]}}}}
            httpx.patch(f"{sb.url}/apis/apps/v1/namespaces/{NS}/deployments/{WL}", json=patch, timeout=10,
                        headers={"Content-Type": "application/strategic-merge-patch+json"}).raise_for_status()
            img = plan(kc, prom.url, api.base_url, end)
            assert img["why"] == "ModelStale" and "parcel-router:2.1.0" in img["message"], img

            # rollback restores the old model; the API serves it after a reload
            rb = subprocess.run([str(RATEFIT), "models", "rollback", KEY, "--store", str(store.root)],
                                capture_output=True, text=True, timeout=60)
            assert rb.returncode == 0, rb.stderr
            assert store.load(KEY).version == v1
            httpx.post(f"{api.base_url}/v1/reload", timeout=30).raise_for_status()
            assert httpx.get(f"{api.base_url}/v1/models/{KEY}", timeout=10).json()["version"] == v1
            assert parse_cpu(plan(kc, prom.url, api.base_url, end)["current"]) == 1000
    finally:
        sb.stop()
