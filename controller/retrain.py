"""Automatic retraining of stale models, off the pass's hot path.

A pass that marks a container's model stale (``controller/staleness``) and whose policy
says ``retrain: Auto`` (or the controller runs with ``--retrain-stale``) hands a
:class:`RetrainJob` to the :class:`Retrainer`: the samples since the change point
(the change-point estimate, at most the staleness window back), when they span at least
``min_span`` (default 2 h; shorter: not yet — the next pass asks again). The job runs in
ONE background worker thread fed by a bounded queue (default 8 jobs): a full queue refuses
new jobs (the next pass retries), and a model already queued or being retrained is not
queued twice. The pass never waits for training.

Training goes through the same path as ``ratefit train --prometheus`` and
``train --from-policies``: ``models.train.train_from_prometheus`` with the container's
queries from ``controller/workload_queries.container_queries`` (rate, cAdvisor CPU,
throttling) and one :class:`~ratefit.models.options.TrainOptions`. The new artifact is
saved with ``ModelStore.save``, which keeps the replaced model as a previous version
(``ratefit models rollback`` restores it); then ``reload`` (e.g. the sizing client's
``POST /v1/reload``) is called so the API serves it.
"""

from __future__ import annotations

import logging
import queue
import threading
import time
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field

from ratefit.controller.policy import Retrain
from ratefit.controller.rate_template import RateTemplate
from ratefit.controller.workload_queries import container_queries
from ratefit.models.durations import format_duration
from ratefit.models.errors import RatefitError
from ratefit.models.options import TrainOptions
from ratefit.models.store import Artifact, ModelStore

__all__ = ["RetrainJob", "RetrainOutcome", "Retrainer", "jobs_for", "MIN_SPAN_S"]

log = logging.getLogger("ratefit.controller.retrain")

#: at least this many seconds of samples since the change point before retraining
MIN_SPAN_S = 2 * 3600.0


@dataclass(frozen=True)
class RetrainJob:
    """Retrain ``model`` from the container's samples over [start, end] (unix s)."""

    model: str
    namespace: str
    workload_kind: str
    workload: str
    container: str
    start: float
    end: float
    rate_query: str | None = None
    image: str | None = None


@dataclass(frozen=True)
class RetrainOutcome:
    job: RetrainJob
    artifact: Artifact | None = None
    #: the version the new one replaced (None: there was none)
    replaced: str | None = None
    error: str = ""
    seconds: float = 0.0


@dataclass
class _State:
    pending: set[str] = field(default_factory=set)
    outcomes: list[RetrainOutcome] = field(default_factory=list)


def jobs_for(snapshot: object, *, now: float, window_s: float, min_span_s: float = MIN_SPAN_S,
             retrain_all: bool = False) -> list[RetrainJob]:
    """The retrain jobs a pass's snapshot calls for: every container whose model is stale,
    of a policy with ``retrain: Auto`` (or every policy with ``retrain_all``), whose samples
    since the change point span at least ``min_span_s``. The job records the image the
    container runs now (the new model is trained on its samples)."""
    out = []
    for o in getattr(snapshot, "entries", ()):
        p = o.policy
        if p is None or not (retrain_all or p.retrain is Retrain.AUTO):
            continue
        rules = {c.name: c for c in p.containers}
        w = getattr(o, "workload", None)
        images = {c.name: c.image for c in (w.containers if w is not None else ())}
        for i in o.inputs:
            st = i.stale
            if st is None or not st.stale or i.name not in rules:
                continue
            start = max(st.change_at if st.change_at is not None else now - window_s, now - window_s)
            if now - start < min_span_s:
                log.info("%s: stale, but only %.0f s of samples since the change; retrained once %.0f s are there",
                         rules[i.name].model, now - start, min_span_s)
                continue
            out.append(RetrainJob(model=rules[i.name].model, namespace=p.namespace, workload_kind=p.workload_kind,
                                  workload=p.workload_name, container=i.name, start=start, end=now,
                                  rate_query=rules[i.name].rate_query, image=images.get(i.name)))
    return out


class Retrainer:
    """One worker thread, a bounded queue, one retrain per model at a time."""

    def __init__(
        self, *, client: object, store: ModelStore, options: TrainOptions | None = None,
        template: RateTemplate = RateTemplate(), step: str = "1m", queue_size: int = 8,
        reload: Callable[[], object] | None = None, source: str = "prometheus",
    ) -> None:
        if queue_size < 1:
            raise ValueError("queue_size must be at least 1")
        self.client = client
        self.store = store
        self.options = options or TrainOptions()
        self.template = template
        self.step = step
        self.reload = reload
        self.source = source
        self._queue: queue.Queue[RetrainJob | None] = queue.Queue(maxsize=queue_size)
        self._lock = threading.Lock()
        self._state = _State()
        self._thread: threading.Thread | None = None

    # -- the pass's side -------------------------------------------------------------
    def submit(self, job: RetrainJob) -> bool:
        """Queue ``job``; False when its model is already queued or running, or the queue is full."""
        with self._lock:
            if job.model in self._state.pending:
                return False
            try:
                self._queue.put_nowait(job)
            except queue.Full:
                log.warning("retrain queue full; %s waits for a later pass", job.model)
                return False
            self._state.pending.add(job.model)
        self._ensure_worker()
        return True

    def submit_all(self, jobs: Iterable[RetrainJob]) -> int:
        return sum(1 for j in jobs if self.submit(j))

    @property
    def outcomes(self) -> list[RetrainOutcome]:
        with self._lock:
            return list(self._state.outcomes)

    def drain(self, timeout: float) -> bool:
        """Wait until every queued job is done (``ratefit run --once`` before it exits).
        True when the queue emptied within ``timeout`` seconds."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            with self._lock:
                if not self._state.pending:
                    return True
            time.sleep(0.1)
        return False

    def stop(self, timeout: float = 5.0) -> None:
        """Stop the worker after its current job (jobs still queued are dropped)."""
        t = self._thread
        if t is None:
            return
        while True:
            try:
                self._queue.get_nowait()
            except queue.Empty:
                break
        try:
            self._queue.put_nowait(None)
        except queue.Full:  # pragma: no cover - just emptied
            pass
        t.join(timeout)
        self._thread = None

    # -- the worker ------------------------------------------------------------------
    def _ensure_worker(self) -> None:
        with self._lock:
            if self._thread is None or not self._thread.is_alive():
                self._thread = threading.Thread(target=self._work, name="ratefit-retrain", daemon=True)
                self._thread.start()

    def _work(self) -> None:
        while True:
            job = self._queue.get()
            if job is None:
                return
            try:
                outcome = self.run(job)
            except Exception as exc:  # one failed job never stops the worker
                outcome = RetrainOutcome(job=job, error=f"{type(exc).__name__}: {exc}")
            with self._lock:
                self._state.pending.discard(job.model)
                self._state.outcomes.append(outcome)
                del self._state.outcomes[:-100]

    def run(self, job: RetrainJob) -> RetrainOutcome:
        """Retrain one model now (the worker's body; callable directly)."""
        from ratefit.models.train import train_from_prometheus

        t0 = time.perf_counter()
        step_s = _seconds(self.step)
        q = container_queries(job.namespace, job.workload_kind, job.workload, job.container, template=self.template)
        rate_q = job.rate_query if job.rate_query is not None else q.rate
        try:
            replaced = self.store.load(job.model).version
        except RatefitError:
            replaced = None
        try:
            res = train_from_prometheus(
                self.client, key=job.model, rate_query=rate_q, cpu_query=q.cpu, throttle_query=q.throttle,
                start=job.start, end=job.end, step=step_s, step_text=self.step,
                source=f"{self.source} (automatic retrain: model stale)", options=self.options)
        except RatefitError as exc:
            log.warning("retraining %s failed: %s", job.model, exc)
            return RetrainOutcome(job=job, replaced=replaced, error=str(exc), seconds=time.perf_counter() - t0)
        art = res.artifact
        if job.image:
            art = art.model_copy(update={"image": job.image, "content_hash": ""}).sealed()
        self.store.save(art)
        log.info("retrained %s over %s: version %s replaces %s; %s", job.model,
                 format_duration(job.end - job.start), art.version, replaced, res.summary())
        if self.reload is not None:
            try:
                self.reload()
            except RatefitError as exc:  # the API picks it up on its next reload
                log.warning("sizing API reload after retraining %s failed: %s", job.model, exc)
        return RetrainOutcome(job=job, artifact=art, replaced=replaced, seconds=time.perf_counter() - t0)


def _seconds(text: str) -> float:
    from ratefit.models.durations import parse_duration

    return parse_duration(text, field="retrain step")
