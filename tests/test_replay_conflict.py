"""Two SizingPolicies naming one workload in the replay: the live loop's rule holds.

The live loop's observe stage (``controller.stages.observe.conflicts``; RECONCILE.md: the
older policy by ``creationTimestamp``, then name, acts) holds the newer one
**PolicyConflict**: it changes nothing and draws nothing from the cluster budget. The
replay must do the same — before it did, the newer policy's changes took budget tokens
and delayed other workloads' changes, so a replay whose twin policy had rates (from
Prometheus) differed from one where it had none (from a file). INVENTED data: the Kestrel
Post demo scenario; the end time below is one at which the two differed.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from ratefit.controller.decide import Verdict, Why
from ratefit.controller.pod_names import PodAssigner, WorkloadRef
from ratefit.controller.replay import StoreSizer, read_openmetrics, run_replay, targets_from_objects, to_json
from ratefit.controller.replay.engine import ReplayOptions, pass_times
from ratefit.controller.replay.series import workload_rates
from ratefit.models.scenario import manifest_objects, write_openmetrics
from ratefit.models.scenario.manifests import default_policies
from ratefit.models.scenario.services import REQUEST_METRIC
from test_replay import truth_store

END = 1_796_189_340.0  # an end at which a twin with rates took the budget from parcels/label-printer


def objects_with_twin(created: tuple[str, str] | None = None) -> list[dict]:
    pols = default_policies()
    twin = json.loads(json.dumps(next(p for p in pols if p["metadata"]["name"] == "customs-gateway")))
    twin["metadata"]["name"] = "customs-gateway-own-query"
    twin["spec"]["containers"][0]["rateQuery"] = "sum by (namespace, pod) (rate(x[2m]))"
    if created is not None:
        orig = next(p for p in pols if p["metadata"]["name"] == "customs-gateway")
        orig["metadata"]["creationTimestamp"], twin["metadata"]["creationTimestamp"] = created
    return [o for objs in manifest_objects().values() for o in objs] + pols + [twin]


def test_the_newer_policy_is_held_and_older_by_creation_time_wins() -> None:
    by_key = {t.policy.key: t for t in targets_from_objects(objects_with_twin()).targets}
    # no creationTimestamp in manifests: the name decides (observe.conflicts)
    assert by_key["dispatch/customs-gateway-own-query"].conflict_with == "dispatch/customs-gateway"
    assert by_key["dispatch/customs-gateway"].conflict_with is None
    got = targets_from_objects(objects_with_twin(("2026-02-01T00:00:00Z", "2026-01-01T00:00:00Z")))
    by_key = {t.policy.key: t for t in got.targets}
    assert by_key["dispatch/customs-gateway"].conflict_with == "dispatch/customs-gateway-own-query"
    assert by_key["dispatch/customs-gateway-own-query"].conflict_with is None
    assert any("PolicyConflict" in n for n in got.notes)


def test_a_held_twin_with_rates_changes_nothing_for_the_other_workloads(tmp_path: Path) -> None:
    info = write_openmetrics(tmp_path / "h.om", end=END, hours=30, step_s=60, seed=4)
    hist = read_openmetrics(info.path, request_metric=REQUEST_METRIC)
    targets = targets_from_objects(objects_with_twin())
    store = truth_store(tmp_path / "store")
    start = info.start + 6 * 3600
    times = pass_times(start, info.end, 300.0)
    pods = hist.pods_by_workload(PodAssigner([WorkloadRef("dispatch", "StatefulSet", "customs-gateway")]))[
        ("dispatch", "StatefulSet", "customs-gateway")]
    rates = workload_rates([hist.requests[("dispatch", p)] for p in pods], times, window_s=86400.0, quantile=0.95,
                           step_s=30.0, interval_s=120.0)
    keep = (10, 100, 200)
    # the default cluster budget (2 changes a minute, one rollout at a time) is shared
    runs = [run_replay(hist, targets, StoreSizer(store), start=start, end=info.end, options=ReplayOptions(),
                       custom_rates=custom, keep=keep)
            for custom in (None, {("dispatch/customs-gateway-own-query", "gateway"): rates})]
    assert np.isfinite(rates).all()
    assert runs[0].sim.changes == runs[1].sim.changes
    assert to_json(runs[0].outcome)["workloads"] == to_json(runs[1].outcome)["workloads"]
    for i in keep:
        twin = [wd for wd in runs[1].sim.decisions[i] if wd.policy == "dispatch/customs-gateway-own-query"]
        assert [(d.verdict, d.why) for d in twin[0].decisions] == [(Verdict.HELD, Why.POLICY_CONFLICT)]
