"""Commands that must not hurt the user's machine (issue 9, item 6).

- The Makefile never stops a process by name: after installing the Debian package it
  stops that package's service by its unit (systemctl, else the init script via
  `service`). Run for real with stub commands on PATH that record their arguments.
- `ratefit demo --out DIR` deletes `DIR/run` only when the demo created it (marker file);
  anything else is refused with a one-line error and left untouched.
- `ratefit sandbox --kubeconfig FILE` refuses an existing file the sandbox did not write,
  unless `--force`; its own kubeconfig is replaced, and still works with the real kubectl.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
from pathlib import Path

import pytest
import yaml

from ratefit.controller.demo import RUN_MARKER, DemoError, prepare_run_dir
from ratefit.controller.local_servers import stop_process
from ratefit.controller.sandbox import kubeconfig
from ratefit.controller.sandbox.server import CONTEXT, SandboxServer

ROOT = Path(__file__).resolve().parents[1]
RATEFIT = [sys.executable, "-m", "ratefit.controller.cli"]
MAKE = shutil.which("make")

USER_KUBECONFIG = """\
apiVersion: v1
kind: Config
clusters: [{name: prod, cluster: {server: "https://10.0.0.1:6443"}}]
users: [{name: admin, user: {token: keep-me}}]
contexts: [{name: prod, context: {cluster: prod, user: admin}}]
current-context: prod
"""


# ---------------------------------------------------------------- the Makefile

def _stub_bin(tmp_path: Path, *, uid: str) -> tuple[Path, Path]:
    """A PATH directory of stub commands; each appends its name and arguments to a log."""
    bin_dir, log = tmp_path / "bin", tmp_path / "calls.log"
    bin_dir.mkdir()
    for name in ("apt-get", "service", "systemctl", "pkill", "killall", "kill"):
        script = bin_dir / name
        # `systemctl is-active` answers "inactive" (no systemd in a container), so the
        # init script path is taken, as on this kind of machine
        extra = 'case "$1" in is-active) exit 3;; esac\n' if name == "systemctl" else ""
        script.write_text(f'#!/bin/sh\necho "{name} $*" >> "{log}"\n{extra}exit 0\n')
        script.chmod(0o755)
    (bin_dir / "id").write_text(f"#!/bin/sh\necho {uid}\n")
    (bin_dir / "id").chmod(0o755)
    return bin_dir, log


def _make(target: str, bin_dir: Path) -> subprocess.CompletedProcess[str]:
    # PATH holds only the stubs: `command -v prometheus` fails, as on a fresh machine
    return subprocess.run([MAKE, "-s", "-C", str(ROOT), target], env={"PATH": str(bin_dir), "HOME": "/nonexistent"},
                          capture_output=True, text=True, timeout=60)


@pytest.mark.skipif(MAKE is None, reason="make is not installed")
def test_makefile_as_root_stops_the_package_service_by_unit_never_by_name(tmp_path: Path) -> None:
    bin_dir, log = _stub_bin(tmp_path, uid="0")
    res = _make("prometheus-optional", bin_dir)
    assert res.returncode == 0, res.stderr
    calls = log.read_text().splitlines()
    assert any(c.startswith("apt-get install") and "prometheus" in c for c in calls), calls
    assert "service prometheus stop" in calls, calls
    assert not any(c.split()[0] in ("pkill", "killall", "kill") for c in calls), calls


@pytest.mark.skipif(MAKE is None, reason="make is not installed")
def test_makefile_without_root_installs_nothing_and_demo_prerequisite_passes(tmp_path: Path) -> None:
    bin_dir, log = _stub_bin(tmp_path, uid="1000")
    res = _make("prometheus-optional", bin_dir)
    assert res.returncode == 0, res.stderr
    assert "Prometheus is not installed" in res.stderr
    assert not log.exists(), log.read_text()  # nothing installed, nothing stopped
    strict = _make("prometheus", bin_dir)  # `make test` needs it: a clear failure
    assert strict.returncode != 0 and "sudo apt-get install -y prometheus" in strict.stderr


def test_makefile_never_names_a_process_to_kill() -> None:
    text = (ROOT / "Makefile").read_text()
    for word in ("pkill", "killall"):
        assert word not in text
    demo = next(line for line in text.splitlines() if line.startswith("demo:"))
    assert "prometheus-optional" in demo.split() and "prometheus" not in demo.split()


# ---------------------------------------------------------------- demo --out

def test_run_dir_created_with_marker_and_replaced_on_the_next_run(tmp_path: Path) -> None:
    work = prepare_run_dir(tmp_path / "run")
    assert (work / RUN_MARKER).is_file()
    (work / "store").mkdir()
    (work / "store" / "a.json").write_text("{}")
    again = prepare_run_dir(tmp_path / "run")
    assert sorted(p.name for p in again.iterdir()) == [RUN_MARKER]


@pytest.mark.parametrize("shape", ["dir-without-marker", "file", "symlink-to-ours", "marker-is-symlink"])
def test_run_dir_not_ours_is_refused_and_left_alone(tmp_path: Path, shape: str) -> None:
    work = tmp_path / "run"
    precious = tmp_path / "precious"
    precious.mkdir()
    (precious / "thesis.tex").write_text("keep")
    if shape == "dir-without-marker":
        work.mkdir()
        (work / "thesis.tex").write_text("keep")
    elif shape == "file":
        work.write_text("keep")
    elif shape == "symlink-to-ours":
        (precious / RUN_MARKER).write_text("forged")
        work.symlink_to(precious)
    else:
        work.mkdir()
        (work / "thesis.tex").write_text("keep")
        (work / RUN_MARKER).symlink_to(precious / "thesis.tex")
    with pytest.raises(DemoError, match="refusing to delete"):
        prepare_run_dir(work)
    assert (precious / "thesis.tex").read_text() == "keep"
    assert work.exists() or work.is_symlink()
    if shape in ("dir-without-marker", "marker-is-symlink"):
        assert (work / "thesis.tex").read_text() == "keep"


def test_demo_cli_refuses_a_foreign_run_dir_in_one_line(tmp_path: Path) -> None:
    out = tmp_path / "out"
    (out / "run").mkdir(parents=True)
    (out / "run" / "notes.txt").write_text("mine")
    res = subprocess.run([*RATEFIT, "demo", "--out", str(out), "--replay", "--hours", "1"],
                         capture_output=True, text=True, timeout=120)
    assert res.returncode == 2
    lines = res.stderr.strip().splitlines()
    assert lines[-1].startswith("ratefit demo: error: refusing to delete") and RUN_MARKER in lines[-1]
    assert "Traceback" not in res.stderr
    assert (out / "run" / "notes.txt").read_text() == "mine"


def test_demo_cli_refuses_a_foreign_kubeconfig_in_out_before_any_work(tmp_path: Path) -> None:
    out = tmp_path / "out"
    out.mkdir()
    (out / "kubeconfig").write_text(USER_KUBECONFIG)
    res = subprocess.run([*RATEFIT, "demo", "--out", str(out), "--replay", "--hours", "1"],
                         capture_output=True, text=True, timeout=120)
    assert res.returncode == 2 and "is not a sandbox kubeconfig" in res.stderr.strip().splitlines()[-1]
    assert (out / "kubeconfig").read_text() == USER_KUBECONFIG
    assert not (out / "run").exists()  # refused before anything was written


# ---------------------------------------------------------------- sandbox --kubeconfig

def test_sandbox_kubeconfig_is_recognised_and_replaced(tmp_path: Path) -> None:
    path = tmp_path / "kc"
    with SandboxServer() as sb:
        sb.write_kubeconfig(path)
        assert kubeconfig.is_sandbox_kubeconfig(path, CONTEXT)
        first = path.read_text()
    with SandboxServer() as sb2:
        sb2.write_kubeconfig(path)  # ours: replaced without --force
        assert yaml.safe_load(path.read_text())["clusters"][0]["cluster"]["server"] == sb2.url
    assert first != path.read_text()


@pytest.mark.parametrize("content", [
    USER_KUBECONFIG,
    # our marker line pasted into a file that names another context is still not ours
    kubeconfig.MARKER + "\n" + USER_KUBECONFIG,
    "not yaml: [",
    "",
])
def test_foreign_kubeconfig_is_refused_unless_forced(tmp_path: Path, content: str) -> None:
    path = tmp_path / "config"
    path.write_text(content)
    with SandboxServer() as sb:
        with pytest.raises(kubeconfig.KubeconfigExists, match="--force"):
            sb.write_kubeconfig(path)
        assert path.read_text() == content
        sb.write_kubeconfig(path, force=True)
        assert kubeconfig.is_sandbox_kubeconfig(path, CONTEXT)


def test_forced_over_a_symlink_replaces_the_link_not_its_target(tmp_path: Path) -> None:
    target = tmp_path / "real-config"
    target.write_text(USER_KUBECONFIG)
    link = tmp_path / "config"
    link.symlink_to(target)
    with SandboxServer() as sb:
        with pytest.raises(kubeconfig.KubeconfigExists):
            sb.write_kubeconfig(link)
        sb.write_kubeconfig(link, force=True)
    assert target.read_text() == USER_KUBECONFIG
    assert not link.is_symlink() and kubeconfig.is_sandbox_kubeconfig(link, CONTEXT)


def test_sandbox_cli_refuses_before_starting_and_force_replaces(tmp_path: Path) -> None:
    path = tmp_path / "config"
    path.write_text(USER_KUBECONFIG)
    res = subprocess.run([*RATEFIT, "sandbox", "--kubeconfig", str(path)], capture_output=True, text=True,
                         timeout=60)
    assert res.returncode == 2
    assert res.stderr.strip().splitlines() == [
        f"ratefit sandbox: error: --kubeconfig {path} exists and is not a sandbox kubeconfig; refusing to "
        "overwrite it (choose another path, or pass --force to replace it)"]
    assert path.read_text() == USER_KUBECONFIG
    proc = subprocess.Popen([*RATEFIT, "sandbox", "--kubeconfig", str(path), "--force"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, start_new_session=True)
    try:
        url = proc.stdout.readline().strip()
        assert url.startswith("http://127.0.0.1:")
        assert kubeconfig.is_sandbox_kubeconfig(path, CONTEXT)
        if shutil.which("kubectl"):
            # the real kubectl accepts the file (marker comment and all)
            got = subprocess.run(["kubectl", "--kubeconfig", str(path), "get", "namespaces", "-o", "name"],
                                 capture_output=True, text=True, timeout=60)
            assert "namespace/default" in got.stdout, got.stderr
        # ours now: a second run replaces it without --force
    finally:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=15)
        except subprocess.TimeoutExpired:
            stop_process(proc)
    res2 = subprocess.Popen([*RATEFIT, "sandbox", "--kubeconfig", str(path)], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, start_new_session=True)
    try:
        assert res2.stdout.readline().startswith("http://127.0.0.1:")
    finally:
        stop_process(res2)
    assert os.path.getsize(path) > 0


# ---------------------------------------------------------------- demo without Prometheus

@pytest.mark.slow
def test_demo_without_prometheus_replays_the_history_and_says_so(tmp_path: Path) -> None:
    """`make demo` needs neither root nor Prometheus: with no prometheus/promtool to be
    found (RATEFIT_PROMETHEUS_BIN points nowhere, as local_servers.prometheus_binaries
    reads it) and no --replay, the demo replays the history file and says so in one line."""
    env = {**os.environ, "RATEFIT_PROMETHEUS_BIN": str(tmp_path / "no-prometheus"),
           "RATEFIT_PROMTOOL_BIN": str(tmp_path / "no-promtool")}
    out = tmp_path / "out"
    res = subprocess.run([*RATEFIT, "demo", "--out", str(out), "--hours", "2", "--output", "json"],
                         capture_output=True, text=True, timeout=600, env=env)
    assert res.returncode == 0, res.stderr[-3000:]
    said = [ln for ln in res.stderr.splitlines() if "Prometheus is not installed" in ln]
    assert len(said) == 1 and "replays the history file" in said[0], res.stderr
    assert "(rates from replay)" in res.stderr
    assert "backfill" not in res.stderr
    assert (out / "run" / RUN_MARKER).is_file()  # its own run dir, marked for the next run
