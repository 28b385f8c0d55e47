"""The controller's main loop: when to run a reconcile pass, and who may run it.

- A pass every ``interval_s`` (default 60 s), earlier when a watch on SizingPolicies
  reports a change (:meth:`ControllerLoop.wake`), later when the pass asked to wait
  (its ``requeue_after``, e.g. the budget's next token).
- Leader election on a coordination Lease (the elector is passed in; see
  ``controller/kube.py``): only the holder runs passes. A standby replica keeps trying
  every ``retry_period_s`` and keeps answering ``/healthz`` and ``/readyz``. While the
  leader waits for its next pass it renews the Lease every ``retry_period_s``, and during
  a long pass ``may_act`` (asked before every write) renews it when due; if a renewal
  fails it stops acting at once (``may_act`` turns False inside a pass).
- Graceful stop (:meth:`ControllerLoop.stop`, called from the SIGTERM handler): the
  pass in progress is told to stop (it finishes the workload it is patching and
  abandons the rest — never half a workload), the loop returns, and the Lease is
  released so a standby takes over without waiting for it to expire.

Time is injected (``clock`` for monotonic seconds, ``wait`` for sleeping on an event)
so tests drive the loop without real waiting.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Protocol

from ratefit.controller.telemetry import Telemetry

__all__ = ["Elector", "ControllerLoop", "PassControl", "LoopStats"]

log = logging.getLogger("ratefit.controller.loop")


class Elector(Protocol):
    """What the loop needs from a Lease lock (``controller/kube.LeaderElector``)."""

    def try_acquire_or_renew(self) -> bool: ...

    def release(self) -> None: ...


@dataclass(frozen=True)
class PassControl:
    """What a pass may ask the loop while it runs."""

    #: True once a stop was requested: finish the current workload, start no new one
    should_stop: Callable[[], bool]
    #: True while this replica may change the cluster (holds a fresh Lease)
    may_act: Callable[[], bool]


@dataclass
class LoopStats:
    passes: int = 0
    failed_passes: int = 0
    acquired: int = 0
    lost: int = 0


def _wait(event: threading.Event, timeout: float) -> bool:
    return event.wait(max(0.0, timeout))


class ControllerLoop:
    """Runs ``run_pass(control) -> result`` on a schedule, as Lease holder only.

    ``run_pass`` returns an object with an optional ``requeue_after`` attribute
    (seconds; None: the normal interval) — the reconcile pass's outcome type.
    Exceptions from a pass are logged and counted; the loop carries on after
    ``error_delay_s`` (the next pass re-reads everything: level-based).
    """

    def __init__(
        self,
        *,
        run_pass: Callable[[PassControl], object],
        elector: Elector | None = None,
        interval_s: float = 60.0,
        retry_period_s: float = 2.0,
        renew_deadline_s: float = 10.0,
        error_delay_s: float = 5.0,
        telemetry: Telemetry | None = None,
        clock: Callable[[], float] = time.monotonic,
        wait: Callable[[threading.Event, float], bool] = _wait,
        max_passes: int | None = None,
    ) -> None:
        if interval_s <= 0:
            raise ValueError("interval must be positive")
        self._run_pass = run_pass
        self._elector = elector
        self.interval_s = float(interval_s)
        self.retry_period_s = float(retry_period_s)
        self.renew_deadline_s = float(renew_deadline_s)
        self.error_delay_s = float(error_delay_s)
        self.telemetry = telemetry or Telemetry()
        self._clock = clock
        self._wait = wait
        self._max_passes = max_passes
        self._stop = threading.Event()
        self._wake = threading.Event()
        self._signal = threading.Event()  # set by stop() or wake(): ends a wait early
        self._leader = elector is None
        self._renewed_at = clock() if elector is None else float("-inf")
        self.stats = LoopStats()
        self._running = False

    # -- control from other threads -----------------------------------------------
    def wake(self) -> None:
        """Run the next pass as soon as possible (a watch saw a policy change)."""
        self._wake.set()
        self._signal.set()

    def stop(self) -> None:
        """Finish or abandon the current pass cleanly, then return from :meth:`run`."""
        self._stop.set()
        self._signal.set()

    @property
    def stopping(self) -> bool:
        return self._stop.is_set()

    @property
    def is_leader(self) -> bool:
        return self._leader

    # -- leadership ----------------------------------------------------------------
    def _may_act(self) -> bool:
        """Leader, not stopping, and the last renewal is younger than the renew deadline."""
        if self._elector is None:
            return True
        if self._leader and self._clock() - self._renewed_at >= self.retry_period_s:
            self._campaign()  # a long pass renews as it goes (before each write it asks here)
        fresh = (self._clock() - self._renewed_at) < self.renew_deadline_s
        own = getattr(self._elector, "is_leader", None)  # the elector's own view, on its clock
        return self._leader and fresh and (own is None or bool(own))

    def _campaign(self) -> bool:
        if self._elector is None:
            return True
        try:
            held = bool(self._elector.try_acquire_or_renew())
        except Exception as exc:  # the API server is down: we cannot prove we hold it
            log.warning("lease renewal failed: %s", exc)
            held = False
        if held:
            self._renewed_at = self._clock()
        if held and not self._leader:
            self.stats.acquired += 1
            log.info("acquired the leader lease")
        elif not held and self._leader:
            self.stats.lost += 1
            log.warning("lost the leader lease; standing by")
        self._leader = held
        self.telemetry.leader.set(1 if held else 0)
        return held

    # -- the loop ------------------------------------------------------------------
    def run(self) -> int:
        """Loop until :meth:`stop` (or ``max_passes``). Returns 0; releases the Lease."""
        self._running = True
        self.telemetry.set_liveness(lambda: self._running)
        control = PassControl(should_stop=self._stop.is_set, may_act=self._may_act)
        try:
            while not self._stop.is_set():
                if not self._campaign():
                    self.telemetry.set_ready(True)  # a standby is ready: it is doing its job
                    self._sleep(self.retry_period_s, renew=False)
                    continue
                self._wake.clear()
                delay = self.interval_s
                try:
                    result = self._run_pass(control)
                    self.stats.passes += 1
                    self.telemetry.set_ready(True)
                    requeue = getattr(result, "requeue_after", None)
                    if requeue is not None:
                        delay = max(0.0, min(delay, float(requeue)))
                except Exception:
                    self.stats.failed_passes += 1
                    log.exception("reconcile pass failed; retrying in %.1fs", self.error_delay_s)
                    delay = min(delay, self.error_delay_s)
                if self._max_passes is not None and self.stats.passes + self.stats.failed_passes >= self._max_passes:
                    break
                self._sleep(delay, renew=True)
        finally:
            self._release()
            self._running = False
        return 0

    def _sleep(self, seconds: float, *, renew: bool) -> None:
        """Wait ``seconds`` (or until woken/stopped), renewing the Lease meanwhile."""
        deadline = self._clock() + seconds
        while not self._stop.is_set():
            left = deadline - self._clock()
            if left <= 0 or self._wake.is_set():
                return
            step = min(left, self.retry_period_s) if (renew and self._elector is not None) else left
            self._signal.clear()
            if self._stop.is_set() or self._wake.is_set():
                return
            self._wait(self._signal, step)
            if renew and self._elector is not None and not self._stop.is_set():
                if not self._campaign():
                    return  # lost it: go back to standing by

    def _release(self) -> None:
        if self._elector is None:
            return
        if self._leader:
            try:
                self._elector.release()
                log.info("released the leader lease")
            except Exception as exc:
                log.warning("could not release the lease (it will expire): %s", exc)
        self._leader = False
        self.telemetry.leader.set(0)
