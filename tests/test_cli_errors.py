"""One-line errors with what to do, for the mistakes people make first: a taken port in
`serve`, a --store directory that does not exist (not "train it": the directory is
missing, not the model)."""

from __future__ import annotations

import socket
import subprocess
import sys
from pathlib import Path

RATEFIT = Path(sys.executable).with_name("ratefit")


def _cli(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([str(RATEFIT), *args], capture_output=True, text=True, timeout=120)


def test_serve_on_a_taken_port_is_one_line_naming_the_port(tmp_path) -> None:
    (tmp_path / "store").mkdir()
    with socket.socket() as taken:  # a listening socket holds the port (loopback only)
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        port = taken.getsockname()[1]
        r = _cli("serve", "--store", str(tmp_path / "store"), "--port", str(port))
    assert r.returncode == 2, r.stderr
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and f"--port {port}" in lines[0] and "already in use" in lines[0], r.stderr


def test_a_missing_store_directory_is_said_so_by_every_command(tmp_path) -> None:
    missing = str(tmp_path / "nowhere")
    for args in (["models", "list"], ["models", "show", "a/b/c"], ["predict", "a/b/c", "--rate", "1"],
                 ["report", "a/b/c", "--out", str(tmp_path / "out")], ["serve"]):
        r = _cli(*args, "--store", missing)
        assert r.returncode == 2, (args, r.stderr)
        assert f"--store {missing}: no such directory" in r.stderr and "train it" not in r.stderr, (args, r.stderr)
        assert len(r.stderr.strip().splitlines()) == 1, (args, r.stderr)


def test_bad_run_durations_are_one_line_naming_the_flag() -> None:
    """Checked before anything is contacted (the sizing API here is a closed port)."""
    for flag, value, words in (("--lease-duration", "1s", "between 2s and 1h"),
                               ("--status-figures-every", "soon", "not a Prometheus duration")):
        r = _cli("run", "--sizing-api", "http://127.0.0.1:1", flag, value)
        assert r.returncode == 2, (flag, r.stderr)
        lines = r.stderr.strip().splitlines()
        assert len(lines) == 1 and flag in lines[0] and words in lines[0], (flag, r.stderr)
