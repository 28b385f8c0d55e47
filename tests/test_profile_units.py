"""The profiler's pure parts and its one-line errors (no load is sent here).

References: numpy.polyfit (least squares) for the fit; os.times / time.process_time
(the kernel's own accounting of this process) for the /proc reader; proc(5) for the
stat fields; the training CSV loader of ratefit.models.samples for the output format.
"""

from __future__ import annotations

import math
import os
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from ratefit.controller.cli import main
from ratefit.controller.profile.cpu_probe import CgroupProbe, CpuReading, ProbeError, ProcTreeProbe, parse_cpu_from
from ratefit.controller.profile.fit import linear_fit
from ratefit.controller.profile.loadgen import Outcome
from ratefit.controller.profile.output import profile_dict, step_markdown, step_table, write_samples_csv
from ratefit.controller.profile.steps import (
    Criteria,
    Profile,
    StepResult,
    find_capacity,
    judge,
    plan_rates,
    summarize_step,
)
from ratefit.models.errors import InputError
from ratefit.models.samples import load_csv


def test_linear_fit_matches_numpy_polyfit() -> None:
    rng = np.random.default_rng(1)
    x = np.linspace(5, 400, 12)
    y = 0.03 + 0.0021 * x + rng.normal(0, 0.01, x.size)
    fit = linear_fit(x, y)
    slope, intercept = np.polyfit(x, y, 1)  # reference: numpy least squares
    assert fit is not None
    assert fit.slope == pytest.approx(slope, rel=1e-9) and fit.intercept == pytest.approx(intercept, abs=1e-12)
    # for a least-squares line R² is the squared correlation coefficient
    assert fit.r2 == pytest.approx(np.corrcoef(x, y)[0, 1] ** 2, rel=1e-9)
    assert linear_fit([1.0], [2.0]) is None and linear_fit([2.0, 2.0], [1.0, 3.0]) is None
    assert math.isnan(linear_fit([1.0, 2.0], [3.0, 3.0]).r2)


def step(rate: float, achieved: float, p99: float = 10.0, errors: float = 0.0) -> StepResult:
    return StepResult(
        target_rate=rate, achieved_rate=achieved, sent_rate=rate, cpu=0.001 * achieved, p50_ms=1.0,
        p95_ms=p99 / 2, p99_ms=p99, error_share=errors, requests=100, errors=int(errors * 100),
    )


def judged(s: StepResult, c: Criteria) -> StepResult:
    from dataclasses import replace

    return replace(s, failed=judge(s, c))


def test_judge_and_capacity() -> None:
    c = Criteria(slo_p99_ms=100, max_errors=0.01, rate_tolerance=0.05)
    assert judge(step(100, 96), c) == ()
    assert "achieved" in judge(step(100, 94), c)[0]
    assert "p99 150 ms > SLO 100 ms" in judge(step(100, 100, p99=150), c)[0]
    assert "errors" in judge(step(100, 100, errors=0.02), c)[0]
    steps = [judged(step(r, a, p), c) for r, a, p in ((10, 10, 5), (20, 20, 8), (40, 40, 90), (80, 60, 900))]
    assert find_capacity(steps) == 40
    assert find_capacity(steps[:3]) is None  # no step failed: the knee is above 40 req/s
    assert find_capacity(steps[3:]) is None  # the first step failed already
    with pytest.raises(InputError, match="--max-errors"):
        Criteria(max_errors=1.5)


def test_plan_rates() -> None:
    assert plan_rates(max_rate=100, steps=4) == [25, 50, 75, 100]
    assert plan_rates(rates=[20, 5, 10, 10]) == [5, 10, 20]
    with pytest.raises(InputError, match="either"):
        plan_rates(rates=[1], max_rate=2)
    with pytest.raises(InputError, match="positive"):
        plan_rates(rates=[0, 5])


class CounterProbe:
    """The counter arithmetic of the local probes, on readings the test writes."""

    description = "test"
    cores = staticmethod(ProcTreeProbe.cores)

    def throttled_shares(self, readings):
        return None


def test_summarize_step_counts_what_happened_in_the_measured_window() -> None:
    # 10 req/s scheduled from t=0 to t=10; window [2, 10); each answered after 5 ms,
    # every 10th with a 500; CPU counter grows 0.02 s per second (0.02 cores)
    outs = [Outcome(i / 10, i / 10, i / 10 + 0.005, 500 if i % 10 == 0 else 200) for i in range(100)]
    readings = [CpuReading(wall=1000 + t, mono=float(t), cpu_seconds=0.02 * t) for t in (2, 4, 6, 8, 10)]
    s = summarize_step(10.0, outs, readings, CounterProbe(), Criteria(max_errors=0.2))
    assert s.requests == 80 and s.errors == 8 and s.error_share == pytest.approx(0.1)
    assert s.achieved_rate == pytest.approx(72 / 8)  # successful completions per second
    assert s.sent_rate == pytest.approx(10.0)
    assert s.cpu == pytest.approx(0.02)
    assert s.p50_ms == pytest.approx(5.0) and s.p99_ms == pytest.approx(5.0)
    assert len(s.samples) == 4 and all(x.cpu == pytest.approx(0.02) for x in s.samples)
    assert s.ok is False  # achieved 9 < 10 x 0.95
    assert not s.client_limited and "achieved" in s.failed[0]


def test_a_starved_client_is_not_taken_for_the_service_knee() -> None:
    """When the client's own loop falls behind (tasks start late), the step says nothing
    about the service: no capacity is recorded from it."""
    c = Criteria(slo_p99_ms=100)
    # due at 10 req/s over [0, 10); the client only got round to them at 6 req/s
    outs = [Outcome(i / 10, i / 6, i / 6 + 0.005, 200, "", i / 6) for i in range(100)]
    readings = [CpuReading(wall=0, mono=float(t), cpu_seconds=0.0) for t in (2, 6, 10)]
    s = summarize_step(10.0, outs, readings, CounterProbe(), c)
    assert s.dispatch_rate == pytest.approx(6.0, rel=0.1)
    assert s.client_limited and "load generator fell behind" in s.failed[0]
    ok = judged(step(5, 5), c)
    assert find_capacity([ok, s]) is None


def test_samples_csv_is_the_training_format(tmp_path: Path) -> None:
    from ratefit.controller.profile.steps import Sample

    c = Criteria()
    steps = []
    for r in (10, 20, 40):
        base = step(r, r)
        from dataclasses import replace

        steps.append(replace(base, samples=tuple(Sample(wall=1e9 + i, rate=r + i % 2, cpu=0.001 * r) for i in range(8))))
    prof = Profile(steps=tuple(steps), capacity=None, fit=linear_fit([10, 20, 40], [0.01, 0.02, 0.04]), stopped="x", criteria=c)
    path = tmp_path / "s.csv"
    assert write_samples_csv(prof, path) == 24
    samples = load_csv(path)  # the training loader itself
    assert len(samples) == 24 and samples.timestamp is None and set(samples.pod) == {"profile"}
    assert write_samples_csv(prof, path, timestamps=True, pod="web-0") == 24
    assert load_csv(path).timestamp is not None
    d = profile_dict(prof, url="http://x", cpu_from="pid:1", samples_file=str(path))
    assert d["slope"] == pytest.approx(0.001) and d["r2"] == pytest.approx(1.0) and d["capacity"] is None
    assert "capacity: not found" in step_table(prof) and step_markdown(prof).startswith("| target req/s")
    # the JSON round-trips to the capacity `ratefit train` will record in the model
    import json

    from ratefit.controller.profile.output import read_capacity

    out = tmp_path / "profile.json"
    out.write_text(json.dumps(d))
    assert read_capacity(out) is None
    out.write_text(json.dumps({**d, "capacity": 40}))
    assert read_capacity(out) == 40.0
    for bad in ('{"capacity": -3, "steps": []}', '{"capacity": "x", "steps": []}', "[]", "not json"):
        out.write_text(bad)
        with pytest.raises(InputError, match="profile.json"):
            read_capacity(out)


def test_proc_probe_reads_this_process_like_the_kernel_says() -> None:
    probe = ProcTreeProbe([os.getpid()])
    a = probe.read(wall=0, mono=0).cpu_seconds
    t0 = time.process_time()
    end = t0 + 0.3
    while time.process_time() < end:
        pass
    b = probe.read(wall=0, mono=1).cpu_seconds
    used = time.process_time() - t0
    assert b - a == pytest.approx(used, abs=0.03)  # proc(5) ticks are 10 ms


def test_proc_probe_counts_children_and_keeps_exited_ones() -> None:
    child = subprocess.Popen([sys.executable, "-c", "import time\nt=time.process_time()+0.3\nwhile time.process_time()<t: pass"])
    probe = ProcTreeProbe([os.getpid()])
    probe.read(wall=0, mono=0)
    assert child.pid in probe.pids()
    before = probe.read(wall=0, mono=0).cpu_seconds
    seen = before
    while child.poll() is None:
        seen = probe.read(wall=0, mono=0).cpu_seconds
        time.sleep(0.02)
    after = probe.read(wall=0, mono=0).cpu_seconds
    assert after >= seen >= before  # the counter never goes back when the child exits
    assert seen - before > 0.1


def test_cgroup_probe_reads_a_real_cpu_stat_or_says_what_is_missing(tmp_path: Path) -> None:
    for root in (Path("/sys/fs/cgroup/unified"), Path("/sys/fs/cgroup")):
        if (root / "cpu.stat").is_file():
            r = CgroupProbe(root).read(wall=0, mono=0)
            assert r.cpu_seconds > 0
            break
    with pytest.raises(ProbeError, match="no such cgroup directory"):
        CgroupProbe(tmp_path / "nope")
    with pytest.raises(ProbeError, match="neither cpu.stat"):
        CgroupProbe(tmp_path)


def gone_pid() -> int:
    p = subprocess.Popen([sys.executable, "-c", "pass"])
    p.wait()
    return p.pid


@pytest.mark.parametrize(
    "args,message",
    [
        (["--url", "ftp://127.0.0.1/", "--rates", "5", "--cpu-from", "pid:1"], "scheme must be http or https"),
        (["--url", "http://127.0.0.1:1/", "--rates", "5", "--cpu-from", "pid:GONE"], "no such process"),
        (["--url", "http://127.0.0.1:1/", "--rates", "5", "--cpu-from", "cgroup:/nonexistent/x"], "no such cgroup directory"),
        (["--url", "http://127.0.0.1:1/", "--rates", "5", "--cpu-from", "prometheus:up"], "needs --prometheus URL"),
        (["--url", "http://127.0.0.1:1/", "--rates", "5,x", "--cpu-from", "pid:1"], "--rates"),
        (["--url", "http://127.0.0.1:1/", "--cpu-from", "pid:1"], "give --rates"),
        (["--url", "http://127.0.0.1:1/", "--rates", "5", "--cpu-from", "cpu:3"], "unknown source"),
        (["--url", "http://127.0.0.1:1/", "--rates", "5", "--cpu-from", "pid:1", "--step-duration", "5s",
          "--warmup", "10s"], "shorter than --step-duration"),
        (["--url", "http://127.0.0.1:1/", "--rates", "5", "--cpu-from", f"pid:{os.getpid()}",
          "--step-duration", "1s"], "cannot reach http://127.0.0.1:1/"),
    ],
)
def test_bad_input_is_one_line(args: list[str], message: str, capsys) -> None:
    if any("GONE" in a for a in args):
        gone = str(gone_pid())
        args = [a.replace("GONE", gone) for a in args]
    assert main(["profile", *args, "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.startswith("ratefit profile: error: ") and message in err
    assert err.count("\n") == 1, err


def test_parse_cpu_from_kinds() -> None:
    assert parse_cpu_from(f"pid:{os.getpid()}").description == f"pid:{os.getpid()}"
    with pytest.raises(InputError, match="pid:N"):
        parse_cpu_from("pid")
