"""The loop's scheduling with an injected clock: interval, wake-up, standby, stop, release.

The Lease itself is exercised against the sandbox in tests/test_faults_leader.py; here a
scripted elector stands in so the schedule can be checked step by step."""

from __future__ import annotations

import threading
from types import SimpleNamespace

from ratefit.controller.loop import ControllerLoop
from ratefit.controller.telemetry import Telemetry


class FakeClock:
    def __init__(self) -> None:
        self.t = 0.0

    def __call__(self) -> float:
        return self.t

    def wait(self, event: threading.Event, timeout: float) -> bool:
        if event.is_set():
            return True
        self.t += timeout
        return False


class ScriptedElector:
    """Holds the lease from call number ``from_call`` on; records release()."""

    def __init__(self, from_call: int = 1) -> None:
        self.calls = 0
        self.from_call = from_call
        self.released = False

    def try_acquire_or_renew(self) -> bool:
        self.calls += 1
        return self.calls >= self.from_call

    def release(self) -> None:
        self.released = True


def test_passes_run_every_interval_and_only_as_leader() -> None:
    clock = FakeClock()
    starts: list[float] = []
    elector = ScriptedElector(from_call=3)  # a standby for two rounds, then the holder
    tel = Telemetry()
    loop = ControllerLoop(run_pass=lambda c: starts.append(clock.t) or SimpleNamespace(requeue_after=None),
                          elector=elector, interval_s=60, retry_period_s=2, renew_deadline_s=10,
                          telemetry=tel, clock=clock, wait=clock.wait, max_passes=3)
    assert loop.run() == 0
    assert starts[0] == 4.0  # two standby rounds of retry_period 2 s
    assert [b - a for a, b in zip(starts, starts[1:])] == [60.0, 60.0]
    assert elector.released and tel.value("ratefit_controller_leader") == 0
    assert tel.ready


def test_requeue_after_shortens_the_wait_and_wake_runs_at_once() -> None:
    clock = FakeClock()
    starts: list[float] = []
    loop: ControllerLoop

    def run_pass(control):
        starts.append(clock.t)
        if len(starts) == 2:
            loop.wake()  # a policy changed while this pass ran
        return SimpleNamespace(requeue_after=5.0 if len(starts) == 1 else None)

    loop = ControllerLoop(run_pass=run_pass, interval_s=60, clock=clock, wait=clock.wait, max_passes=3)
    loop.run()
    assert starts == [0.0, 5.0, 5.0]


def test_stop_inside_a_pass_is_seen_by_should_stop_and_releases() -> None:
    elector = ScriptedElector()
    seen = []

    def run_pass(control):
        assert control.may_act()
        loop.stop()  # SIGTERM arrives mid-pass
        seen.append(control.should_stop())
        return SimpleNamespace(requeue_after=None)

    loop = ControllerLoop(run_pass=run_pass, elector=elector, interval_s=60)
    loop.run()
    assert seen == [True] and elector.released and not loop.is_leader


def test_a_failing_pass_is_counted_and_retried() -> None:
    clock = FakeClock()
    calls = []

    def run_pass(control):
        calls.append(clock.t)
        if len(calls) == 1:
            raise RuntimeError("boom")
        return None

    loop = ControllerLoop(run_pass=run_pass, interval_s=60, error_delay_s=5, clock=clock, wait=clock.wait, max_passes=2)
    loop.run()
    assert calls == [0.0, 5.0] and loop.stats.failed_passes == 1
