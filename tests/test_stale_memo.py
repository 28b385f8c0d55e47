"""The staleness check runs every pass but judges each container at most once per interval
(controller/stale_memo.py), and is on by default with --prometheus (issue 13: "Each pass,
alongside the rates, the controller reads each container's recent CPU usage").

The end-to-end use (real Prometheus, real `ratefit serve`, the sandbox: a carried verdict keeps
the container held ModelStale and sends no usage query) is in tests/test_stale_release.py.
"""

from __future__ import annotations

import argparse
import subprocess
import sys
from pathlib import Path

import pytest

from ratefit.controller.commands.run import stale_window
from ratefit.controller.stale_memo import JudgementMemo
from ratefit.controller.staleness import Staleness
from ratefit.models.errors import InputError

RATEFIT = Path(sys.executable).with_name("ratefit")


def verdict(above: int) -> Staleness:
    return Staleness(samples=72, above=above, nominal=0.05, p_value=0.5)


def test_every_container_gets_its_turn_never_judged_first_then_oldest() -> None:
    clock = [0.0]
    memo = JudgementMemo(every_s=600, per_pass=2, clock=lambda: clock[0])
    asked = [(f"ns/p/c{i}", ("ns/w/c", "v1")) for i in range(5)]
    seen: list[list[str]] = []
    for _ in range(4):
        due = memo.due(asked)
        seen.append(due)
        for k in due:
            memo.put(k, ("ns/w/c", "v1"), verdict(1))
        clock[0] += 300
    # passes 1-3 judge the never-judged in order (2, 2, 1); pass 3 has room for one more but
    # c0/c1 were judged 600 s before pass 3 — they are due again, the oldest first
    assert seen[0] == ["ns/p/c0", "ns/p/c1"]
    assert seen[1] == ["ns/p/c2", "ns/p/c3"]
    assert seen[2] == ["ns/p/c4", "ns/p/c0"]
    assert seen[3] == ["ns/p/c1", "ns/p/c2"]
    assert all(len(d) <= 2 for d in seen)


def test_a_verdict_is_carried_until_its_interval_has_passed() -> None:
    clock = [100.0]
    memo = JudgementMemo(every_s=600, per_pass=10, clock=lambda: clock[0])
    model = ("ns/w/c", "v1")
    assert memo.due([("k", model)]) == ["k"]
    memo.put("k", model, verdict(40))
    clock[0] += 599
    assert memo.due([("k", model)]) == []
    assert memo.known(["k"]) == {"k": verdict(40)}
    clock[0] += 1
    assert memo.due([("k", model)]) == ["k"]


def test_a_retrained_model_is_judged_afresh() -> None:
    memo = JudgementMemo(every_s=600, per_pass=10, clock=lambda: 0.0)
    memo.put("k", ("ns/w/c", "v1"), verdict(40))
    assert memo.due([("k", ("ns/w/c", "v1"))]) == []
    assert memo.due([("k", ("ns/w/c", "v2"))]) == ["k"]


def test_nothing_to_judge_is_remembered_without_a_verdict_and_memory_is_bounded() -> None:
    memo = JudgementMemo(every_s=600, per_pass=10, clock=lambda: 0.0)
    memo.put("a", ("m", None), None)
    memo.put("b", ("m", None), verdict(3))
    assert memo.due([("a", ("m", None)), ("b", ("m", None))]) == []
    assert memo.known(["a", "b"]) == {"b": verdict(3)}
    # a container no longer asked is forgotten
    memo.due([("b", ("m", None))])
    assert len(memo) == 1
    memo.forget("b")
    assert len(memo) == 0


@pytest.mark.parametrize("every, per_pass", [(-1.0, 1), (10.0, 0)])
def test_bad_settings_are_refused(every: float, per_pass: int) -> None:
    with pytest.raises(ValueError):
        JudgementMemo(every_s=every, per_pass=per_pass)


def _args(**kw: object) -> argparse.Namespace:
    base = dict(prometheus=None, replay=None, stale_window=None)
    base.update(kw)
    return argparse.Namespace(**base)


def test_the_check_is_on_by_default_with_prometheus_and_off_with_a_replay(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv("RATEFIT_STALE_WINDOW", raising=False)
    assert stale_window(_args(prometheus="http://127.0.0.1:9090")) == "6h"
    assert stale_window(_args(prometheus="http://127.0.0.1:9090", stale_window="12h")) == "12h"
    assert stale_window(_args(prometheus="http://127.0.0.1:9090", stale_window="off")) is None
    assert stale_window(_args(replay="history.json")) is None
    assert stale_window(_args(replay="history.json", stale_window="off")) is None
    with pytest.raises(InputError, match="needs --prometheus"):
        stale_window(_args(replay="history.json", stale_window="6h"))


def test_help_says_the_default() -> None:
    out = subprocess.run([str(RATEFIT), "run", "--help"], capture_output=True, text=True, timeout=60).stdout
    flat = " ".join(out.split())
    assert "else 6h with --prometheus" in flat and "--stale-every" in flat and "--stale-per-pass" in flat


def test_the_background_judge_runs_one_job_at_a_time_and_never_raises(caplog: pytest.LogCaptureFixture) -> None:
    import threading

    from ratefit.controller.stale_memo import BackgroundJudge

    judge = BackgroundJudge()
    gate, ran = threading.Event(), []
    assert judge.submit(lambda: (gate.wait(10), ran.append(1)))
    assert not judge.submit(lambda: ran.append(2))  # busy: dropped, the next pass hands it over again
    gate.set()
    assert judge.wait(10) and ran == [1] and judge.dropped == 1

    def boom() -> None:
        raise RuntimeError("Prometheus went away")

    with caplog.at_level("ERROR"):
        assert judge.submit(boom)
        assert judge.wait(10)
    assert "staleness judgement failed" in caplog.text and judge.done == 2
    judge.stop()
    assert not judge.submit(lambda: ran.append(3)) and ran == [1]
