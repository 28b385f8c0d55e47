"""A rate snapshot refreshed by its own loop, so a pass never waits for Prometheus.

:class:`RateSnapshot` wraps a rate source (``controller/metrics_source``) and is one
itself. A background thread asks the wrapped source every ``period_s`` for the rates of
the containers the last pass asked about (one grouped query, as a pass would); a pass
reads the latest answers from memory — like the watch-fed cache feeds the Kubernetes
objects. What the snapshot cannot answer is asked at once, in the pass (only those
containers): the first pass, a new policy or container, a changed query, window or
percentile (the request differs), and every answer older than ``max_age_s`` (the
refresh failing, or stuck). So a rate is at most ``max_age_s`` old, and never older
than the last refresh that succeeded.

The age of the snapshot (seconds since its oldest answer was taken) is the gauge
``ratefit_controller_rate_snapshot_age_seconds``, the seconds of the last refresh
``ratefit_controller_rate_snapshot_refresh_seconds``, failed refreshes
``ratefit_controller_rate_snapshot_refresh_errors_total``; a failed refresh is
logged as a warning. Rates of a policy's ``rateWindow`` (default 1 h) move slowly, so
an answer one refresh old (default 30 s) sizes the same request in practice; set the
period below the pass interval to keep every pass on fresh rates.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable, Mapping, Sequence

from ratefit.controller.metrics_source import RateRequest, RateResult
from ratefit.controller.stages.ports import RateSource
from ratefit.models.errors import RatefitError

__all__ = ["RateSnapshot"]

log = logging.getLogger("ratefit.controller.rates")


class RateSnapshot:
    """A :class:`~ratefit.controller.stages.ports.RateSource` answering from memory,
    refreshed every ``period_s`` by its own thread (see the module docstring)."""

    def __init__(
        self, source: RateSource, *, period_s: float = 30.0, max_age_s: float | None = None,
        monotonic: Callable[[], float] = time.monotonic, registry: object | None = None,
    ) -> None:
        if not period_s > 0:
            raise ValueError(f"the rate refresh period must be positive, got {period_s}")
        self.source = source
        self.period_s = float(period_s)
        self.max_age_s = float(max_age_s) if max_age_s is not None else 3.0 * self.period_s
        if self.max_age_s < self.period_s:
            raise ValueError(f"max_age_s ({self.max_age_s}) must be at least the period ({self.period_s})")
        self._mono = monotonic
        self._lock = threading.Lock()
        #: key → (the request answered, its answer, monotonic time taken)
        self._answers: dict[str, tuple[RateRequest, RateResult, float]] = {}
        #: the requests of the last pass: what the next refresh asks
        self._wanted: tuple[RateRequest, ...] = ()
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        #: for the benchmark and the metrics: the last refresh's wall seconds, refreshes, failures,
        #: and the requests answered from memory / asked at once by the last pass
        self.last_refresh_s = 0.0
        self.refreshes = 0
        self.failures = 0
        self.hits = 0
        self.asked_now = 0
        self._failed_metric: object | None = None
        if registry is not None:
            self._register(registry)

    # -- the RateSource a pass reads ----------------------------------------------------
    def per_pod_rates(self, requests: Sequence[RateRequest]) -> Mapping[str, RateResult]:
        """The latest answers for ``requests``; those the snapshot lacks (or holds too old)
        are asked now. Remembers ``requests`` for the next refresh."""
        now = self._mono()
        out: dict[str, RateResult] = {}
        missing: list[RateRequest] = []
        with self._lock:
            self._wanted = tuple(requests)
            for r in requests:
                got = self._answers.get(r.key)
                if got is not None and got[0] == r and now - got[2] <= self.max_age_s:
                    out[r.key] = got[1]
                else:
                    missing.append(r)
        self.hits, self.asked_now = len(out), len(missing)
        if missing:
            if self.hits:
                log.info("rates: %d of %d containers not in the snapshot (new, changed or too old); asking now",
                         len(missing), len(requests))
            fresh = self.source.per_pod_rates(missing)  # errors go to the pass, as without a snapshot
            self._store(missing, fresh, now)
            out.update({r.key: fresh[r.key] for r in missing if r.key in fresh})
        return out

    # -- the refresh loop -----------------------------------------------------------------
    def start(self) -> RateSnapshot:
        """Start the refresh thread (idempotent)."""
        if self._thread is None:
            self._thread = threading.Thread(target=self._loop, name="ratefit-rate-refresh", daemon=True)
            self._thread.start()
        return self

    def stop(self, timeout: float = 10.0) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout)
            self._thread = None

    close = stop

    def refresh(self) -> bool:
        """One refresh of every wanted rate (what the thread does each period). False:
        nothing wanted yet, or the source failed (the old answers stay, ageing)."""
        with self._lock:
            wanted = self._wanted
        if not wanted:
            return False
        t, started = time.perf_counter(), self._mono()
        try:
            fresh = self.source.per_pod_rates(wanted)
        except RatefitError as exc:
            self._failed()
            log.warning("rate refresh failed (%s); the snapshot is %.0f s old", exc, self.age())
            return False
        self._store(wanted, fresh, started)
        self.last_refresh_s = time.perf_counter() - t
        self.refreshes += 1
        return True

    def age(self) -> float:
        """Seconds since the oldest answer a pass may still use was taken (0: empty)."""
        now = self._mono()
        with self._lock:
            times = [at for _, _, at in self._answers.values()]
        return max(0.0, now - min(times)) if times else 0.0

    def _store(self, asked: Sequence[RateRequest], fresh: Mapping[str, RateResult], at: float) -> None:
        wanted = {r.key for r in self._wanted}
        with self._lock:
            for r in asked:
                got = fresh.get(r.key)
                if got is not None:
                    self._answers[r.key] = (r, got, at)
            for gone in [k for k in self._answers if k not in wanted]:
                del self._answers[gone]  # policies or containers that are gone

    def _failed(self) -> None:
        self.failures += 1
        if self._failed_metric is not None:
            self._failed_metric.inc()  # type: ignore[attr-defined]

    def _loop(self) -> None:
        while not self._stop.wait(self.period_s):
            try:
                self.refresh()
            except Exception:  # never let the refresh thread die silently; the pass falls back to asking
                self._failed()
                log.exception("rate refresh failed")

    def _register(self, registry: object) -> None:
        from prometheus_client import Counter, Gauge

        Gauge("ratefit_controller_rate_snapshot_age_seconds",
              "Seconds since the oldest rate in the controller's rate snapshot was taken.",
              registry=registry).set_function(self.age)  # type: ignore[arg-type]
        Gauge("ratefit_controller_rate_snapshot_refresh_seconds",
              "Wall seconds of the last refresh of the rate snapshot (the grouped PromQL query).",
              registry=registry).set_function(lambda: self.last_refresh_s)  # type: ignore[arg-type]
        self._failed_metric = Counter("ratefit_controller_rate_snapshot_refresh_errors",
                                      "Refreshes of the rate snapshot that failed (the old rates stay until too old).",
                                      registry=registry)  # type: ignore[arg-type]
