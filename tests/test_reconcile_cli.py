"""The CLI around the pass: `ratefit plan` (table/markdown, changes nothing), `ratefit
revert` (restores the annotated previous requests), `ratefit run` flags and errors."""

from __future__ import annotations

import subprocess
import sys
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
        r = _cli("revert", "shop/deploy/web", "--kubeconfig", str(w.kubeconfig))
        assert r.returncode == 0, r.stderr
        assert "app: cpu request 100m, limit 200m (restored)" in r.stdout
        assert w.cpu("shop", "web", "app") == ("100m", "200m")
        assert w.cpu("shop", "web", "side") == ("50m", None)
        assert "ratefit.dev/previous-requests" not in (w.workload("shop", "web")["metadata"].get("annotations") or {})
        again = _cli("revert", "shop/Deployment/web", "--kubeconfig", str(w.kubeconfig))
        assert again.returncode == 0 and "nothing to revert" in again.stdout


def test_bad_input_is_an_error_naming_the_flag(tmp_path, shared_sizing_api) -> None:
    r = _cli("revert", "shop/web")
    assert r.returncode == 2 and "NAMESPACE/KIND/NAME" in r.stderr
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
