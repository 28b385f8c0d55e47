"""The CLI around the pass: `ratefit plan` (table/markdown, changes nothing), `ratefit
revert` (restores the annotated previous requests), `ratefit run` flags and errors."""

from __future__ import annotations

import subprocess
import sys
import time
from pathlib import Path

# shared_sizing_api is a pytest fixture (one real `ratefit serve` per session)
from reconcile_fixtures import shared_sizing_api, deployment, policy, world
from ratefit.controller.quantity import parse_cpu

RATEFIT = Path(sys.executable).with_name("ratefit")
OBJECTS = [deployment("shop", "web", [("app", "100m", "200m"), ("side", "50m", None)]),
           policy("shop", "web", workload="web", containers=[{"name": "app", "model": "shop/web/app"}])]
RATES = {("shop", "web"): [50.0]}


def _cli(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([str(RATEFIT), *args], capture_output=True, text=True, timeout=120)


def test_plan_table_and_markdown_change_nothing(tmp_path, shared_sizing_api) -> None:
    with world(tmp_path, objects=OBJECTS, api_url=shared_sizing_api, rates=RATES) as w:
        before = w.resource_versions()
        common = ["--kubeconfig", str(w.kubeconfig), "--replay", str(w.history), "--rate-at", str(w.at),
                  "--sizing-api", w.api_url]
        t = _cli("plan", *common)
        assert t.returncode == 0, t.stderr
        line = next(ln for ln in t.stdout.splitlines() if "Deployment/web" in ln)
        assert line.split()[1:4] == ["app", "100m", "315m"] and "Proposed" in line
        m = _cli("plan", *common, "--output", "markdown")
        assert m.returncode == 0 and m.stdout.startswith("| workload | container | current |")
        assert "nothing was changed" in t.stderr
        assert w.resource_versions() == before


def test_revert_restores_the_previous_requests(tmp_path, shared_sizing_api) -> None:
    with world(tmp_path, objects=OBJECTS, api_url=shared_sizing_api, rates=RATES) as w:
        assert w.reconciler().run_pass().patched == ("shop/Deployment/web",)
        assert parse_cpu(w.cpu("shop", "web", "app")[0]) == 315
        r = _cli("revert", "deploy/web", "-n", "shop", "--kubeconfig", str(w.kubeconfig))
        assert r.returncode == 0, r.stderr
        assert "app: cpu request 100m, limit 200m (restored)" in r.stdout
        assert w.cpu("shop", "web", "app") == ("100m", "200m")
        assert w.cpu("shop", "web", "side") == ("50m", None)
        assert "ratefit.dev/previous-requests" not in (w.workload("shop", "web")["metadata"].get("annotations") or {})
        again = _cli("revert", "shop/Deployment/web", "--kubeconfig", str(w.kubeconfig))
        assert again.returncode == 0 and "nothing to revert" in again.stdout


def test_bad_input_is_an_error_naming_the_flag(tmp_path, shared_sizing_api) -> None:
    r = _cli("revert", "shop/web/x/y")
    assert r.returncode == 2 and "KIND/NAME with -n NAMESPACE" in r.stderr
    r = _cli("plan", "--sizing-api", "http://127.0.0.1:1")
    assert r.returncode == 2 and "--prometheus URL or --replay FILE" in r.stderr
    r = _cli("run", "--sizing-api", "http://127.0.0.1:1", "--replay", str(tmp_path / "nope.om"))
    assert r.returncode == 2 and "no such file" in r.stderr


def test_run_honours_ratefit_dry_run_from_the_environment(tmp_path, shared_sizing_api) -> None:
    """The deploy manifests set RATEFIT_DRY_RUN=true: every policy is forced to dry-run."""
    import os

    with world(tmp_path, objects=OBJECTS, api_url=shared_sizing_api, rates=RATES) as w:
        env = {**os.environ, "RATEFIT_DRY_RUN": "true"}
        r = subprocess.run([str(RATEFIT), "run", "--once", "--no-leader-election", "--metrics-port", "-1",
                            "--kubeconfig", str(w.kubeconfig), "--replay", str(w.history), "--rate-at", str(w.at),
                            "--sizing-api", w.api_url], capture_output=True, text=True, timeout=120, env=env)
        assert r.returncode == 0, r.stderr
        assert "mode dry-run (forced)" in r.stderr
        assert w.cpu("shop", "web", "app") == ("100m", "200m") and w.patches("shop", "web") == []
        (p,) = w.sizing_policy("shop", "web")["status"]["containers"]
        assert p["verdict"] == "Proposed" and parse_cpu(p["newRequest"]) == 315
        # the policy asks Apply; the controller runs forced dry-run, and the status says so
        assert w.sizing_policy("shop", "web")["status"]["effectiveMode"] == "DryRun"


def _common(w) -> list[str]:
    return ["--kubeconfig", str(w.kubeconfig), "--replay", str(w.history), "--rate-at", str(w.at)]


def test_plan_exit_codes_say_which_input_could_not_be_reached(tmp_path, shared_sizing_api) -> None:
    """0 with its inputs; 5 when the sizing API is not there (every container NoModel),
    with one summary line on stderr; 3 when the API server is not there."""
    import json

    with world(tmp_path, objects=OBJECTS, api_url=shared_sizing_api, rates=RATES) as w:
        ok = _cli("plan", *_common(w), "--sizing-api", w.api_url, "-o", "json")
        assert ok.returncode == 0, ok.stderr
        (row,) = json.loads(ok.stdout)
        assert row["replicas"] == 2 and row["message"]  # the fixture's Deployment: replicas 2 (its default)
        assert row["change_m"] == 2 * row["change_per_pod_m"] == 2 * (315 - 100)
        down = _cli("plan", *_common(w), "--sizing-api", "http://127.0.0.1:1", "-o", "json")
        assert down.returncode == 5, down.stderr
        assert [r["why"] for r in json.loads(down.stdout)] == ["NoModel"]  # the review is still printed
        errors = [ln for ln in down.stderr.splitlines() if ln.startswith("ratefit plan: error:")]
        assert len(errors) == 1 and "sizing API" in errors[0] and "--sizing-api" in errors[0]
        assert "Traceback" not in down.stderr
        no_prom = _cli("plan", "--kubeconfig", str(w.kubeconfig), "--prometheus", "http://127.0.0.1:1",
                       "--sizing-api", w.api_url, "-o", "json", "--timeout", "2")
        assert no_prom.returncode == 4, no_prom.stderr
        assert [r["why"] for r in json.loads(no_prom.stdout)] == ["NoMetrics"]
        (line,) = [ln for ln in no_prom.stderr.splitlines() if ln.startswith("ratefit plan: error:")]
        assert "Prometheus could not be reached" in line and "--prometheus" in line
    kc = tmp_path / "gone.kubeconfig"
    kc.write_text("apiVersion: v1\nkind: Config\nclusters: [{name: c, cluster: {server: 'http://127.0.0.1:1'}}]\n"
                  "contexts: [{name: c, context: {cluster: c, user: u}}]\ncurrent-context: c\n"
                  "users: [{name: u, user: {token: x}}]\n")
    r = _cli("plan", "--kubeconfig", str(kc), "--replay", str(tmp_path / "history.om"), "--sizing-api",
             "http://127.0.0.1:1")
    assert r.returncode == 3, r.stderr
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "could not be reached" in lines[0]  # printed once, not twice


def test_run_once_checks_the_lease_namespace_first(tmp_path, shared_sizing_api) -> None:
    """A Lease cannot be created in a namespace that does not exist: the API server answers
    404 (its NamespaceLifecycle admission; from memory). The sandbox does not check
    namespaces on create, so a fault rule answers that 404; after the first miss --once
    reads the namespace and stops in one line instead of waiting as a standby forever."""
    with world(tmp_path, objects=OBJECTS, api_url=shared_sizing_api, rates=RATES) as w:
        w.sandbox.faults.add("*", "/namespaces/no-such-ns/leases", status=404, count=None)
        r = subprocess.run([str(RATEFIT), "run", "--once", "--metrics-port", "-1", *_common(w),
                            "--sizing-api", w.api_url, "--lease-namespace", "no-such-ns"],
                           capture_output=True, text=True, timeout=60)
        assert r.returncode == 2, r.stderr
        (line,) = [ln for ln in r.stderr.splitlines() if "error" in ln]
        assert "no-such-ns" in line and "--no-leader-election" in line
        assert w.patches("shop", "web") == []


def test_negative_budgets_and_malformed_kubeconfigs_are_refused_in_one_line(tmp_path) -> None:
    history = tmp_path / "h.om"
    history.write_text("# EOF\n")
    for flag in ("--budget-per-minute", "--max-rollouts"):
        r = _cli("run", "--once", "--replay", str(history), "--sizing-api", "http://127.0.0.1:1", flag, "-1")
        assert r.returncode == 2 and flag in r.stderr and "0 (unlimited) or positive" in r.stderr, r.stderr
    bad = tmp_path / "bad.kubeconfig"
    bad.write_text("apiVersion: v1\nkind: [Config\n")
    for args in (["plan", "--replay", str(history), "--sizing-api", "http://127.0.0.1:1"],
                 ["revert", "deploy/web", "-n", "shop"]):
        r = _cli(*args, "--kubeconfig", str(bad))
        assert r.returncode == 2 and "Traceback" not in r.stderr, r.stderr
        assert len(r.stderr.strip().splitlines()) == 1 and "not a valid kubeconfig" in r.stderr
    r = _cli("revert", "deploy/web", "--kubeconfig", str(tmp_path / "missing"))
    assert r.returncode == 2 and "no such file" in r.stderr


def test_run_once_gives_up_when_another_replica_holds_the_lease(tmp_path, shared_sizing_api) -> None:
    """--once as a standby would wait forever: it stops after two Lease durations (15 s
    each by default, client-go's; 3 s here, --lease-duration) with exit 7, naming the
    holder, and changes nothing."""
    from datetime import datetime, timezone

    now = datetime.now(timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")
    lease = {"apiVersion": "coordination.k8s.io/v1", "kind": "Lease",
             "metadata": {"namespace": "ratefit-system", "name": "ratefit-controller"},
             "spec": {"holderIdentity": "the-other-replica", "leaseDurationSeconds": 3600,
                      "acquireTime": now, "renewTime": now}}
    ns = {"apiVersion": "v1", "kind": "Namespace", "metadata": {"name": "ratefit-system"}}
    with world(tmp_path, objects=[ns, lease, *OBJECTS], api_url=shared_sizing_api, rates=RATES) as w:
        t0 = time.monotonic()
        r = subprocess.run([str(RATEFIT), "run", "--once", "--metrics-port", "-1", "--lease-duration", "3s",
                            *_common(w), "--sizing-api", w.api_url], capture_output=True, text=True, timeout=120)
        assert r.returncode == 7, r.stderr[-2000:]
        assert time.monotonic() - t0 >= 6.0  # it waited two Lease durations first
        (line,) = [ln for ln in r.stderr.splitlines() if ln.startswith("ratefit run: error:")]
        assert "the-other-replica" in line and "--no-leader-election" in line
        assert w.patches("shop", "web") == []
