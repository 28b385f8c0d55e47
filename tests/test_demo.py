"""`ratefit demo` end to end (a short history to keep it quick): the review has one row
per scenario container, the files are written, and nothing it started is left running."""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path

import httpx
import pytest
import yaml

from ratefit.models.scenario.services import SCENARIO

RATEFIT = Path(sys.executable).with_name("ratefit")


@pytest.mark.slow
@pytest.mark.parametrize("source", ["replay", "prometheus"])
def test_demo_prints_the_review_and_stops_everything(tmp_path, source) -> None:
    if source == "prometheus":
        from prom_fixtures import require_prometheus

        require_prometheus()
    args = [str(RATEFIT), "demo", "--out", str(tmp_path / "out"), "--hours", "4", "--output", "json"]
    if source == "replay":
        args.append("--replay")
    proc = subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    out, err = proc.communicate(timeout=300)
    assert proc.returncode == 0, err[-3000:]
    doc = json.loads(out)
    rows, later = doc["now"], doc["after_settle"]["rows"]
    want = {(s.namespace, s.workload, c.name) for s in SCENARIO for c in s.containers}
    for rs in (rows, later):
        assert {(r["namespace"], r["workload"].split("/", 1)[1], r["container"]) for r in rs} == want
        assert all(r["verdict"] in ("Held", "Proposed") for r in rs)  # DryRun passes: nothing "Changed"
    # past the settle period nothing is still Settling (the rates are the same)
    assert not any(r["why"] == "Settling" for r in later)
    assert f"rates from {source}" in err
    assert ("backfilled with promtool" in err) == (source == "prometheus")
    outdir = tmp_path / "out"
    md = (outdir / "review.md").read_text()
    assert "INVENTED" in md and md.count("\n| ") >= len(want) + 1
    assert len(list((outdir / "reports").glob("*.md"))) == len(want)
    # everything it started is stopped: the sandbox and the sizing API no longer answer
    server = yaml.safe_load((outdir / "kubeconfig").read_text())["clusters"][0]["cluster"]["server"]
    with pytest.raises(httpx.HTTPError):
        httpx.get(server + "/version", timeout=2)
    urls = re.findall(r"(?:ratefit serve at|Prometheus at) (http://127\.0\.0\.1:\d+)", err)
    assert len(urls) == (2 if source == "prometheus" else 1), err
    for url in urls:
        with pytest.raises(httpx.HTTPError):
            httpx.get(url + "/-/ready", timeout=2)


@pytest.mark.slow
@pytest.mark.parametrize("sig", ["SIGTERM"])  # SIGINT takes the same path (KeyboardInterrupt)
def test_demo_interrupted_stops_everything(tmp_path, sig) -> None:
    import signal
    import time

    proc = subprocess.Popen([str(RATEFIT), "demo", "--out", str(tmp_path / "out"), "--hours", "4", "--replay"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    seen = []
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline:
        line = proc.stderr.readline()
        if not line:
            break
        seen.append(line)
        if "sizing API: ratefit serve at" in line:
            break
    urls = re.findall(r"ratefit serve at (http://127\.0\.0\.1:\d+)", "".join(seen))
    assert urls, "".join(seen)
    assert httpx.get(urls[0] + "/healthz", timeout=5).status_code == 200  # it is up …
    proc.send_signal(getattr(signal, sig))
    _, err = proc.communicate(timeout=60)
    assert proc.returncode == 130, err  # the CLI's exit status for an interrupt
    with pytest.raises(httpx.HTTPError):  # … and stopped
        httpx.get(urls[0] + "/healthz", timeout=2)
