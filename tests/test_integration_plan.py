"""End to end with real parts: the real Prometheus holding the INVENTED Kestrel Post
history (backfilled with promtool), a real `ratefit serve` over the scenario's true
curves, the sandbox loaded with the scenario's workloads, HPA and one policy per
workload; `ratefit plan` and `ratefit run` as subprocesses.

Expectations are computed here, independently of the controller:
- rate: the test's own PromQL (Prometheus docs, "Subquery" and quantile_over_time):
  max over pods of the p95 of each pod's 2m request rate over the last hour;
- upper: the scenario's TRUE curve at that rate plus the band (the store is tabulated
  from the truth), read back from the sizing API's GET …/demand;
- proposed = ceil5(upper × (1 + headroom)) within [floor, ceiling] (DESIGN.md "One
  decision", step 3); held InsideDeadband when |proposed − current| ≤ deadband × current
  or < 10m (step 4); held HorizontalConflict for the workload with a CPU HPA (step 9).
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import httpx
import pytest

from api_fixtures import serve_process
from reconcile_fixtures import CRD, ceil5, policy
from ratefit.controller.quantity import parse_cpu
from ratefit.models.curve import DemandCurve
from ratefit.models.scenario.services import REQUEST_METRIC, SCENARIO
from ratefit.models.store import Artifact, CurveData, CVRow, DataWindow, ModelStore

pytestmark = pytest.mark.prometheus

RATEFIT = Path(sys.executable).with_name("ratefit")
BAND = 0.02  # cores, the upper band of every true curve in this store
#: that band is no conformal band of the scenario's noise (usage lies above truth + 0.02 far
#: more often than 5 %), so the staleness check (on by default) would rightly call these
#: models stale; this module checks the decision's arithmetic, with the check off
NO_STALENESS = ["--stale-window", "off"]
HEADROOM, DEADBAND = 0.15, 0.10


def truth_artifact(key: str, truth, rate_hi: float) -> Artifact:
    curve = DemandCurve.tabulate(lambda r: truth(r), rate_lo=0.0, rate_hi=rate_hi, band=BAND)
    return Artifact(
        key=key, chosen="truth", coverage=0.95, rate_range=(0.0, rate_hi), curve=CurveData(**curve.to_dict()),
        samples=1, samples_total=1, dropped={}, cv=[CVRow(model="truth", rmse=0.0, mae=0.0, p95=0.0)],
        folds=5, seed=0, window=DataWindow(source="INVENTED Kestrel Post truth"), trained_at="2026-01-01T00:00:00Z",
    ).sealed()


def scenario_policies(mode: str) -> list[dict]:
    out = []
    for svc in SCENARIO:
        out.append(policy(svc.namespace, svc.workload, workload=svc.workload, kind=svc.kind, mode=mode,
                          containers=[{"name": c.name, "model": f"{svc.namespace}/{svc.workload}/{c.name}",
                                       "floor": "10m"} for c in svc.containers],
                          headroomPercent=round(HEADROOM * 100), deadbandPercent=round(DEADBAND * 100)))
    return out


def write_truth_store(root: Path) -> None:
    """The scenario's true curves, one artifact per container."""
    store = ModelStore(root)
    for svc in SCENARIO:
        for c in svc.containers:
            # the grid spans twice the busiest pod's peak rate (fine enough for the step shape)
            hi = 2.0 * svc.rate_profile.peak / svc.replicas * (1 + svc.rate_profile.imbalance)
            store.save(truth_artifact(f"{svc.namespace}/{svc.workload}/{c.name}", c.truth, hi))


@pytest.fixture(scope="module")
def parts(scenario_prometheus, tmp_path_factory):
    """(prometheus history, sizing API url, store dir) shared by the module."""
    tmp = tmp_path_factory.mktemp("integration")
    write_truth_store(tmp / "store")
    with serve_process(tmp / "store", workdir=tmp) as api:
        yield scenario_prometheus, api.base_url, tmp


def start_sandbox(tmp: Path, mode: str):
    from ratefit.controller.sandbox import SandboxServer
    from ratefit.models.scenario.manifests import manifest_objects

    sb = SandboxServer(host="127.0.0.1", port=0, load=[CRD]).start()
    for objs in manifest_objects().values():
        for o in objs:
            if o["kind"] != "Service":  # the sandbox serves no Services (a StatefulSet's headless one)
                sb.create(o)
    for p in scenario_policies(mode):
        sb.create(p)
    kc = sb.write_kubeconfig(tmp / f"kubeconfig-{mode}")
    return sb, kc


def independent_rates(prom_url: str, at: float) -> dict[tuple[str, str], float]:
    q = (f"max by (namespace, workload) (quantile_over_time(0.95, sum by (namespace, workload, pod) "
         f"(rate({REQUEST_METRIC}[2m]))[1h:30s]))")
    r = httpx.post(prom_url + "/api/v1/query", data={"query": q, "time": f"{at:.3f}"}, timeout=30)
    r.raise_for_status()
    return {(s["metric"]["namespace"], s["metric"]["workload"]): float(s["value"][1]) for s in r.json()["data"]["result"]}


def plan(kubeconfig: Path, prom_url: str, api_url: str, at: float) -> list[dict]:
    p = subprocess.run([str(RATEFIT), "plan", "--kubeconfig", str(kubeconfig), "--prometheus", prom_url,
                        "--rate-metric", REQUEST_METRIC, "--rate-at", str(at), "--sizing-api", api_url,
                        "--output", "json", *NO_STALENESS], capture_output=True, text=True, timeout=120)
    assert p.returncode == 0, p.stderr
    return json.loads(p.stdout)


def run_once(kubeconfig: Path, prom_url: str, api_url: str, at: float) -> None:
    p = subprocess.run([str(RATEFIT), "run", "--once", "--no-leader-election", "--metrics-port", "-1",
                        "--kubeconfig", str(kubeconfig), "--prometheus", prom_url, "--rate-metric", REQUEST_METRIC,
                        "--rate-at", str(at), "--sizing-api", api_url, "--budget-per-minute", "0", *NO_STALENESS,
                        "--max-rollouts", "0"], capture_output=True, text=True, timeout=120)
    assert p.returncode == 0, p.stderr


def rvs(url: str) -> dict[str, str]:
    out = {}
    for path in ("/apis/apps/v1/deployments", "/apis/apps/v1/statefulsets", "/api/v1/pods",
                 "/apis/ratefit.dev/v1alpha1/sizingpolicies", "/apis/autoscaling/v2/horizontalpodautoscalers"):
        for o in httpx.get(url + path, timeout=10).json()["items"]:
            out[f"{path}/{o['metadata'].get('namespace')}/{o['metadata']['name']}"] = o["metadata"]["resourceVersion"]
    out["events"] = str(len(httpx.get(url + "/apis/events.k8s.io/v1/events", timeout=10).json()["items"]))
    return out


def expected_rows(prom_url: str, api_url: str, at: float) -> dict[tuple[str, str, str], dict]:
    rates = independent_rates(prom_url, at)
    out = {}
    for svc in SCENARIO:
        rate = rates[(svc.namespace, svc.workload)]
        for c in svc.containers:
            key = f"{svc.namespace}/{svc.workload}/{c.name}"
            ans = httpx.get(f"{api_url}/v1/models/{key}/demand", params={"rate": rate}, timeout=10).json()
            # the store holds the truth: the API's upper is truth + band (to the grid's precision)
            assert ans["demand_bound_m"] / 1000 == pytest.approx(float(c.truth(rate)) + BAND, rel=0.02, abs=0.002)
            target = max(10, ceil5(ans["demand_bound_m"] * (1 + HEADROOM)))
            diff = abs(target - c.request_m)
            if not (diff > DEADBAND * c.request_m and diff >= 10):
                verdict, why, proposed = "Held", "InsideDeadband", c.request_m
            elif svc.hpa_on_cpu:
                verdict, why, proposed = "Held", "HorizontalConflict", target
            else:
                verdict, why, proposed = "Proposed", "NewTarget", target
            out[(svc.namespace, svc.workload, c.name)] = {
                "rate": rate, "upper_m": ans["demand_bound_m"], "proposed_m": proposed, "verdict": verdict, "why": why,
                "limit_m": c.limit_m, "request_m": c.request_m, "replicas": svc.replicas}
    return out


def test_plan_prints_the_expected_proposals_and_changes_nothing(parts) -> None:
    hist, api_url, tmp = parts
    sb, kc = start_sandbox(tmp, "DryRun")
    try:
        before = rvs(sb.url)
        rows = plan(kc, hist.url, api_url, hist.end)
        assert rvs(sb.url) == before  # plan changes nothing: every resourceVersion as it was
    finally:
        sb.stop()
    want = expected_rows(hist.url, api_url, hist.end)
    got = {(r["namespace"], r["workload"].split("/", 1)[1], r["container"]): r for r in rows}
    assert set(got) == set(want)
    for k, exp in want.items():
        row = got[k]
        assert row["rate"] == pytest.approx(exp["rate"], rel=1e-3), k
        assert row["demand_bound_m"] == exp["upper_m"], k
        assert (row["verdict"], row["why"]) == (exp["verdict"], exp["why"]), k
        assert row["proposed_m"] == exp["proposed_m"], k
        assert parse_cpu(row["current"]) == exp["request_m"]
    # the invented scenario has both directions: over-provisioned ones come down, throttled ones go up
    assert any(r["verdict"] == "Proposed" and r["proposed_m"] < r["current_m"] for r in rows)
    assert any(r["why"] == "HorizontalConflict" for r in rows)
    # what a person pays for, by hand: replicas (the scenario's spec.replicas) × the per-pod change
    total_change = 0
    for k, exp in want.items():
        per_pod = exp["proposed_m"] - exp["request_m"] if exp["verdict"] == "Proposed" else 0
        assert got[k]["replicas"] == exp["replicas"], k
        assert (got[k]["change_per_pod_m"], got[k]["change_m"]) == (per_pod, exp["replicas"] * per_pod), k
        total_change += exp["replicas"] * per_pod
    assert total_change != 0
    from ratefit.controller.review import ReviewRow, totals

    t = totals([ReviewRow(namespace=r["namespace"], policy=r["policy"], kind=r["kind"],
                          workload=r["workload"].split("/", 1)[1], container=r["container"], verdict=r["verdict"],
                          current_m=r["current_m"], proposed_m=r["proposed_m"], replicas=r["replicas"]) for r in rows])
    assert t.change_m == total_change
    assert t.now_m == sum(e["replicas"] * e["request_m"] for e in want.values())


def test_apply_patches_exactly_the_changed_containers_and_a_second_pass_changes_nothing(parts) -> None:
    hist, api_url, tmp = parts
    want = expected_rows(hist.url, api_url, hist.end)
    sb, kc = start_sandbox(tmp, "Apply")
    try:
        run_once(kc, hist.url, api_url, hist.end)
        for (ns, wl, cname), exp in want.items():
            kind = "statefulsets" if wl == "customs-gateway" else "deployments"
            obj = httpx.get(f"{sb.url}/apis/apps/v1/namespaces/{ns}/{kind}/{wl}", timeout=10).json()
            c = {x["name"]: x for x in obj["spec"]["template"]["spec"]["containers"]}[cname]
            req = parse_cpu(c["resources"]["requests"]["cpu"])
            lim = c["resources"].get("limits", {}).get("cpu")
            if exp["verdict"] == "Proposed":  # apply mode: changed, with the proposed value
                assert req == exp["proposed_m"], (ns, wl, cname)
                if exp["limit_m"] is not None:  # keep-ratio (DESIGN.md step 8), never below the request
                    assert parse_cpu(lim) == max(math.ceil(exp["limit_m"] * req / exp["request_m"] - 1e-9), req)
            else:
                assert req == exp["request_m"], (ns, wl, cname)
        first = {k: v for k, v in rvs(sb.url).items() if "/apis/apps/" in k}
        run_once(kc, hist.url, api_url, hist.end)
        assert {k: v for k, v in rvs(sb.url).items() if "/apis/apps/" in k} == first  # nothing changed
    finally:
        sb.stop()
