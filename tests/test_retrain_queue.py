"""controller/retrain.py without Prometheus: which stale models a pass hands over
(jobs_for), and the worker's rules — one job per model at a time, a bounded queue that
refuses rather than blocks the pass. (Training itself runs against the real Prometheus in
tests/test_stale_release.py.)"""

from __future__ import annotations

import copy
import threading
from datetime import datetime, timezone
from pathlib import Path

from decide_fixtures import BASE
from ratefit.controller.decide import ContainerInput, Sizing
from ratefit.controller.policy import parse_policy
from ratefit.controller.retrain import MIN_SPAN_S, RetrainJob, RetrainOutcome, Retrainer, jobs_for
from ratefit.controller.stages.observe import Observed, Snapshot
from ratefit.controller.staleness import Staleness
from ratefit.controller.workload import ContainerResources, PolicyObject, Workload, WorkloadKind
from ratefit.models.store import ModelStore


NOW = 1_800_000_000.0
WINDOW = 6 * 3600.0


def observed(retrain: str, change_at: float | None, stale: bool = True) -> Observed:
    obj = copy.deepcopy(BASE)
    obj["spec"]["retrain"] = retrain
    p = parse_policy(obj)
    st = Staleness(samples=72, above=50 if stale else 3, nominal=0.05, p_value=1e-30 if stale else 0.6,
                   usage_p95=0.5, change_at=change_at)
    w = Workload(namespace="parcels", kind=WorkloadKind("Deployment"), name="label-printer", uid="u", generation=1,
                 resource_version="1", replicas=2, selector="", annotations={},
                 containers=(ContainerResources("app", 500, None, image="registry.kestrel-post.example/lp:3"),),
                 rollout_in_progress=False)
    po = PolicyObject(namespace="parcels", name="label-printer", uid="p", generation=1, resource_version="1",
                      spec=obj["spec"], status={})
    return Observed(obj=po, policy=p, workload=w,
                    inputs=(ContainerInput("app", 500, None, 10.0, Sizing(0.3, 0.35), stale=st),))


def snap(*entries: Observed) -> Snapshot:
    return Snapshot(now=datetime.fromtimestamp(NOW, tz=timezone.utc), entries=entries)


def test_jobs_for_auto_policies_with_enough_samples_since_the_change() -> None:
    jobs = jobs_for(snap(observed("Auto", NOW - 3 * 3600)), now=NOW, window_s=WINDOW)
    assert len(jobs) == 1
    j = jobs[0]
    assert (j.model, j.start, j.end) == ("parcels/label-printer/app", NOW - 3 * 3600, NOW)
    assert j.image == "registry.kestrel-post.example/lp:3" and j.workload_kind == "Deployment"
    # a change point older than the window: the window's start
    assert jobs_for(snap(observed("Auto", NOW - 9 * 3600)), now=NOW, window_s=WINDOW)[0].start == NOW - WINDOW
    # too little since the change: not yet
    assert jobs_for(snap(observed("Auto", NOW - MIN_SPAN_S + 60)), now=NOW, window_s=WINDOW) == []
    # Manual policies only with retrain_all; fresh models never
    assert jobs_for(snap(observed("Manual", NOW - 3 * 3600)), now=NOW, window_s=WINDOW) == []
    assert len(jobs_for(snap(observed("Manual", NOW - 3 * 3600)), now=NOW, window_s=WINDOW, retrain_all=True)) == 1
    assert jobs_for(snap(observed("Auto", NOW - 3 * 3600, stale=False)), now=NOW, window_s=WINDOW) == []


class Gated(Retrainer):
    """A Retrainer whose training waits for the test (to see the queue while a job runs)."""

    def __init__(self, tmp: Path, **kw) -> None:
        super().__init__(client=None, store=ModelStore(tmp), **kw)
        self.gate = threading.Event()
        self.started = threading.Event()
        self.ran: list[str] = []

    def run(self, job: RetrainJob) -> RetrainOutcome:
        self.started.set()
        self.gate.wait(30)
        self.ran.append(job.model)
        return RetrainOutcome(job=job, error="gated")


def job(model: str) -> RetrainJob:
    return RetrainJob(model=model, namespace="a", workload_kind="Deployment", workload="w", container="c",
                      start=NOW - 3 * 3600, end=NOW)


def test_one_job_per_model_and_a_bounded_queue(tmp_path: Path) -> None:
    r = Gated(tmp_path, queue_size=2)
    try:
        assert r.submit(job("a/w/c1"))
        assert r.started.wait(10)  # the worker took it: it is running, not queued
        assert not r.submit(job("a/w/c1"))  # already running
        assert r.submit(job("a/w/c2")) and r.submit(job("a/w/c3"))
        assert not r.submit(job("a/w/c4"))  # queue of 2 is full: refused, the pass goes on
        r.gate.set()
        assert r.drain(timeout=30)
        assert r.ran == ["a/w/c1", "a/w/c2", "a/w/c3"]
        assert [o.error for o in r.outcomes] == ["gated"] * 3
        assert r.submit(job("a/w/c1"))  # done: may be queued again
        assert r.drain(timeout=30)
    finally:
        r.gate.set()
        r.stop()
