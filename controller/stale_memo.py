"""Each container's last staleness judgement, kept between passes of ``ratefit run``.

The staleness check (``controller/staleness``) looks at hours of usage (default 6 h); its
verdict moves slowly, while a pass comes every minute or so. Judging every container every
pass would cost two range queries per container per pass against Prometheus. So the check
runs on every pass, but each container is judged again only when its last judgement is
older than ``every_s`` (default 10 min), at most ``per_pass`` containers per pass — the
ones never judged first, then the longest ago (a rotation: with more containers than
``per_pass`` every one still gets its turn). Between judgements a container carries its
last verdict; a judgement is tied to the model it judged (key and version), so a
retrained or replaced model is judged afresh on the next pass that has room.

Only answers are remembered: a container whose usage could not be read (Prometheus
trouble, the source's own cap) is asked again on the next pass. A container with no
samples at all is remembered as "nothing to judge" until its turn comes again.

Memory is bounded: entries of containers no longer asked are dropped each pass. The memo
is safe to share between the pass and a :class:`BackgroundJudge` (one lock).

:class:`BackgroundJudge` (``ratefit run``): the judgements themselves — two range queries
per container and a sizing batch for the bands — run on a thread of their own, so a pass
never waits for them; the pass hands over the containers that are due and reads the
verdicts remembered so far (a container's first verdict arrives a pass or two later).
``ratefit plan`` judges in the pass (one shot: it waits for its verdicts).
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass

from ratefit.controller.staleness import Staleness

__all__ = ["BackgroundJudge", "JudgementMemo", "DEFAULT_EVERY_S", "DEFAULT_PER_PASS"]

log = logging.getLogger(__name__)

#: judge a container again after this many seconds (a 6 h window moves little in 10 min)
DEFAULT_EVERY_S = 600.0
#: containers judged at most per pass (two range queries each; about 1.7 s for 500 on the judge's
#: thread, tests/bench/bench_stale.py)
DEFAULT_PER_PASS = 500


@dataclass(frozen=True, slots=True)
class _Entry:
    at: float  # monotonic time of the judgement
    model: tuple[str, str | None]  # (model key, version) judged
    verdict: Staleness | None  # None: no samples to judge


class JudgementMemo:
    """Which containers are due for judgement this pass, and the last verdict of the others."""

    def __init__(self, *, every_s: float = DEFAULT_EVERY_S, per_pass: int = DEFAULT_PER_PASS,
                 clock: Callable[[], float] = time.monotonic) -> None:
        if not every_s >= 0:
            raise ValueError(f"the staleness re-judge interval must be >= 0 seconds, got {every_s}")
        if per_pass < 1:
            raise ValueError(f"containers judged per pass must be at least 1, got {per_pass}")
        self.every_s = float(every_s)
        self.per_pass = int(per_pass)
        self._clock = clock
        self._entries: dict[str, _Entry] = {}
        self._lock = threading.Lock()

    def due(self, asked: Sequence[tuple[str, tuple[str, str | None]]]) -> list[str]:
        """Of ``asked`` ((container key, (model key, version)) pairs, in the pass's order),
        the keys to judge this pass: never judged, judged for another model, or judged more
        than ``every_s`` ago — never judged first, then oldest first, at most ``per_pass``.
        Drops the entries of containers not asked (bounded memory)."""
        now = self._clock()
        keys = {k for k, _ in asked}
        candidates: list[tuple[float, int, str]] = []
        with self._lock:
            for gone in [k for k in self._entries if k not in keys]:
                del self._entries[gone]
            for i, (key, model) in enumerate(asked):
                e = self._entries.get(key)
                if e is None or e.model != model:
                    candidates.append((float("-inf"), i, key))
                elif now - e.at >= self.every_s:
                    candidates.append((e.at, i, key))
        candidates.sort()
        return [key for _, _, key in candidates[: self.per_pass]]

    def put(self, key: str, model: tuple[str, str | None], verdict: Staleness | None) -> None:
        """Remember a judgement made now (``verdict`` None: no samples to judge)."""
        entry = _Entry(at=self._clock(), model=model, verdict=verdict)
        with self._lock:
            self._entries[key] = entry

    def known(self, keys: Iterable[str]) -> dict[str, Staleness]:
        """The remembered verdicts of ``keys`` (those with one)."""
        out: dict[str, Staleness] = {}
        with self._lock:
            for k in keys:
                e = self._entries.get(k)
                if e is not None and e.verdict is not None:
                    out[k] = e.verdict
        return out

    def forget(self, key: str) -> None:
        """Judge ``key`` afresh on the next pass (e.g. after its model was retrained)."""
        with self._lock:
            self._entries.pop(key, None)

    def __len__(self) -> int:
        with self._lock:
            return len(self._entries)


class BackgroundJudge:
    """Runs one judgement job at a time on a daemon thread. :meth:`submit` never waits: while
    a job runs, a new one is dropped (the next pass hands the still-due containers over
    again). A job's exception is logged, never raised into a pass."""

    def __init__(self, *, sizing: object | None = None) -> None:
        #: the sizing client the judge asks for the bands (its own: never shared with the pass)
        self.sizing = sizing
        self._lock = threading.Lock()
        self._thread: threading.Thread | None = None
        self._stopped = False
        #: jobs finished and jobs dropped because one was running (for tests and the log)
        self.done = 0
        self.dropped = 0

    def submit(self, job: Callable[[], None]) -> bool:
        """Start ``job`` on the judge's thread unless one is running; True when started."""
        with self._lock:
            if self._stopped:
                return False
            if self._thread is not None and self._thread.is_alive():
                self.dropped += 1
                return False
            self._thread = threading.Thread(target=self._run, args=(job,), name="ratefit-stale-judge", daemon=True)
            self._thread.start()
            return True

    def _run(self, job: Callable[[], None]) -> None:
        try:
            job()
        except Exception:  # a judgement is an extra: it never stops the controller
            log.exception("staleness judgement failed; the containers are judged again on a later pass")
        with self._lock:
            self.done += 1

    def wait(self, timeout: float | None = None) -> bool:
        """Wait for the running job (True when none runs afterwards)."""
        t = self._thread
        if t is not None:
            t.join(timeout)
        return t is None or not t.is_alive()

    def stop(self, timeout: float = 30.0) -> None:
        """No new jobs; wait up to ``timeout`` for the running one."""
        with self._lock:
            self._stopped = True
        self.wait(timeout)
