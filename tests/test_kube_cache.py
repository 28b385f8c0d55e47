"""The watch-fed cache (controller/kube_cache.py) against the sandbox API server: the real
``kubernetes`` client LISTs and WATCHes over HTTP; the sandbox serves bookmarks, 410 Gone
(a watch position older than its history, as the API server's watch cache does) and
dropped streams (fault injection). What the cache holds is checked against what a LIST
of the API server returns (Kubernetes API concepts, "Efficient detection of changes":
a watch from a list's resourceVersion sees every later change; 410 Gone means list
again). Objects are the INVENTED test scenario of tests/reconcile_fixtures.py.
"""

from __future__ import annotations

import copy
import json
import time
from collections.abc import Callable, Iterator
from typing import Any

import httpx
import pytest

from reconcile_fixtures import CRD, deployment, hpa, policy, statefulset
from ratefit.controller.errors import KubeConflict, KubeNotFound
from ratefit.controller.kube import KubeAdapter
from ratefit.controller.kube_cache import CachedKube, CacheNotSynced, FrozenDict, FrozenList, KubeCache
from ratefit.controller.policy import parse_policy
from ratefit.controller.reconcile import policy_object_dict
from ratefit.controller.sandbox import SandboxServer
from ratefit.controller.workload import CpuChange, WorkloadKind


def eventually(check: Callable[[], Any], *, timeout: float = 15.0, what: str = "condition") -> Any:
    """Poll ``check()`` until it returns something truthy (watch delivery is asynchronous)."""
    deadline = time.monotonic() + timeout
    while True:
        got = check()
        if got:
            return got
        assert time.monotonic() < deadline, f"timed out waiting for {what}"
        time.sleep(0.05)


def _objects(ns: str, *, resize_by: str = "Rollout") -> list[dict[str, Any]]:
    return [
        deployment(ns, "web", [("app", "500m", "1"), ("side", "100m", None)]),
        deployment(ns, "api", [("app", "250m", None)], replicas=1),
        statefulset(ns, "db", [("app", "1", "2")], replicas=1),
        hpa(ns, "web", target="web"),
        hpa(ns, "api", target="api", cpu_utilization=False),
        policy(ns, "web", workload="web", containers=[{"name": "app", "model": f"{ns}/web/app"}], resizeBy=resize_by),
        policy(ns, "db", workload="db", kind="StatefulSet", containers=[{"name": "app", "model": f"{ns}/db/app"}]),
    ]


@pytest.fixture
def cluster(tmp_path) -> Iterator[tuple[SandboxServer, KubeAdapter]]:
    """The sandbox with the CRD and two namespaces of objects; an adapter for LIST reads."""
    sb = SandboxServer(load=[CRD], bookmark_interval=0.2).start()
    try:
        for obj in _objects("shop", resize_by="InPlace") + _objects("bank"):
            sb.create(obj)
        kube = KubeAdapter.from_kubeconfig(str(sb.write_kubeconfig(tmp_path / "kubeconfig")), identity="test",
                                           sleep=lambda s: None)
        try:
            yield sb, kube
        finally:
            kube.close()
    finally:
        sb.stop()


@pytest.fixture
def caches() -> Iterator[Callable[..., KubeCache]]:
    made: list[KubeCache] = []

    def make(kube: KubeAdapter, **kwargs: Any) -> KubeCache:
        kwargs.setdefault("watch_timeout_s", 30)
        cache = KubeCache.for_adapter(kube, **kwargs).start()
        made.append(cache)
        assert cache.wait_synced(20), "the cache did not sync"
        return cache

    yield make
    for c in made:
        c.stop()


def _by_key(values: Any) -> dict[tuple[str, str], Any]:
    return {(v.namespace, v.name): v for v in values}


def _lists(sb: SandboxServer, path_part: str) -> list[dict[str, Any]]:
    """LIST requests (GET of a collection, no watch) whose path ends with ``path_part``."""
    return [r for r in sb.requests if r["method"] == "GET" and r["path"].endswith(path_part)
            and r["query"].get("watch") != "true"]


def _watches(sb: SandboxServer, path_part: str = "") -> list[dict[str, Any]]:
    return [r for r in sb.requests if r["method"] == "GET" and r["path"].endswith(path_part)
            and r["query"].get("watch") == "true"]


# ---------------------------------------------------------------- sync and changes
def test_after_the_first_sync_it_holds_what_a_list_returns(cluster, caches) -> None:
    sb, kube = cluster
    sb.clear_requests()
    cache = caches(kube)
    assert cache.has_synced()
    # one paged LIST per resource, then watches from the list's resourceVersion with bookmarks
    for path in ("/apis/apps/v1/deployments", "/apis/ratefit.dev/v1alpha1/sizingpolicies",
                 "/apis/apps/v1/statefulsets", "/apis/autoscaling/v2/horizontalpodautoscalers"):
        assert len(_lists(sb, path)) == 1, path
        w = eventually(lambda: _watches(sb, path), what=f"a watch of {path}")
        assert w[0]["query"]["allowWatchBookmarks"] == "true" and w[0]["query"]["resourceVersion"] not in ("", "0")
    for kind in (WorkloadKind.DEPLOYMENT, WorkloadKind.STATEFULSET):
        assert _by_key(cache.list_workloads(kind)) == _by_key(kube.list_workloads(kind))
        assert _by_key(cache.list_workloads(kind, namespace="bank")) == _by_key(kube.list_workloads(kind, namespace="bank"))
    assert _by_key(cache.list_hpas()) == _by_key(kube.list_hpas())
    assert _by_key(cache.list_hpas("shop")) == _by_key(kube.list_hpas("shop"))
    assert _by_key(cache.list_policies().items) == _by_key(kube.list_policies().items)
    assert _by_key(cache.list_policies(["bank"]).items) == _by_key(kube.list_policies(["bank"]).items)
    assert cache.read_workload("shop", "Deployment", "web") == kube.read_workload("shop", "Deployment", "web")
    with pytest.raises(KubeNotFound):
        cache.read_workload("shop", "Deployment", "nope")


def test_adds_changes_and_deletes_are_seen(cluster, caches) -> None:
    sb, kube = cluster
    woken: list[int] = []
    cache = caches(kube, on_policy_change=lambda: woken.append(1))
    sb.create(deployment("bank", "new", [("app", "300m", None)]))
    eventually(lambda: any(w.name == "new" for w in cache.list_workloads("Deployment", namespace="bank")), what="ADDED")
    httpx.patch(f"{sb.url}/apis/apps/v1/namespaces/bank/deployments/new",
                json={"spec": {"template": {"spec": {"containers": [{"name": "app", "resources": {"requests": {"cpu": "700m"}}}]}}}},
                headers={"Content-Type": "application/strategic-merge-patch+json"}, timeout=10).raise_for_status()
    eventually(lambda: cache.read_workload("bank", "Deployment", "new").containers[0].cpu_request_m == 700, what="MODIFIED")
    # the sandbox's rollout writes the status again after the patch (a later resourceVersion):
    # the cache converges to what a direct read returns once those writes stop
    eventually(lambda: cache.read_workload("bank", "Deployment", "new") == kube.read_workload("bank", "Deployment", "new"),
               what="the cache equal to a direct read")
    httpx.delete(f"{sb.url}/apis/apps/v1/namespaces/bank/deployments/new", timeout=10).raise_for_status()
    eventually(lambda: all(w.name != "new" for w in cache.list_workloads("Deployment")), what="DELETED")
    # a policy's spec change wakes the loop; a status write (generation unchanged) does not
    kube.write_policy_status("bank", "web", {"observedGeneration": 1})
    eventually(lambda: cache.list_policies(["bank"]) and any(
        p.status.get("observedGeneration") == 1 for p in cache.list_policies(["bank"]).items), what="status")
    assert woken == []
    httpx.patch(f"{sb.url}/apis/ratefit.dev/v1alpha1/namespaces/bank/sizingpolicies/web", json={"spec": {"headroomPercent": 30}},
                headers={"Content-Type": "application/merge-patch+json"}, timeout=10).raise_for_status()
    eventually(lambda: woken, what="the wake-up on a spec change")
    assert cache.stats().total("relists") == 0


def test_a_410_gone_relists_and_converges(tmp_path, caches) -> None:
    # a history of 3 changes: a watcher that falls further behind gets ERROR 410 Expired
    sb = SandboxServer(load=[CRD], bookmark_interval=0.2, history=3).start()
    try:
        for obj in _objects("shop"):
            sb.create(obj)
        kube = KubeAdapter.from_kubeconfig(str(sb.write_kubeconfig(tmp_path / "kc")), identity="t", sleep=lambda s: None)
        cache = caches(kube)
        with sb.store.lock:  # the watch cannot read until all of these are done: it falls behind
            for i in range(4):
                sb.create(deployment("shop", f"burst-{i}", [("app", "100m", None)], replicas=0))
            sb.store.remove(("apps", "deployments"), "shop", "api")
        eventually(lambda: cache.stats().per_resource["deployments"].gone >= 1, what="a 410")
        eventually(lambda: _by_key(cache.list_workloads("Deployment")) == _by_key(kube.list_workloads("Deployment")),
                   what="convergence after the relist")
        st = cache.stats().per_resource["deployments"]
        assert st.relists >= 1 and st.lists == 1 + st.relists
        assert {w.name for w in cache.list_workloads("Deployment")} == {"web", "burst-0", "burst-1", "burst-2", "burst-3"}
        kube.close()
    finally:
        sb.stop()


def test_a_dropped_stream_resumes_without_a_list(cluster, caches) -> None:
    sb, kube = cluster
    cache = caches(kube, namespaces=["shop", "bank"], watch_timeout_s=1)  # watches end every 1-2 s
    rule = sb.faults.add("GET", r"/namespaces/bank/deployments$", drop_watch=True, count=1)
    eventually(lambda: rule.hits == 1 and cache.stats().per_resource["deployments"].drops >= 1, what="the dropped stream")
    sb.create(deployment("bank", "after-drop", [("app", "100m", None)], replicas=0))
    eventually(lambda: any(w.name == "after-drop" for w in cache.list_workloads("Deployment", namespace="bank")),
               what="a change after the drop")
    st = cache.stats().per_resource["deployments"]
    assert st.relists == 0 and st.gone == 0
    assert len(_lists(sb, "/namespaces/bank/deployments")) == 1  # the first LIST only: resumed, not relisted
    rvs = [int(r["query"]["resourceVersion"]) for r in _watches(sb, "/namespaces/bank/deployments")]
    assert rvs == sorted(rvs) and len(rvs) >= 2  # every watch resumes at or after the last position


def test_two_namespaces_mean_namespaced_watches_and_no_cluster_wide_request(cluster, caches) -> None:
    sb, kube = cluster
    sb.clear_requests()
    cache = caches(kube, namespaces=["shop", "bank"])
    time.sleep(0.5)
    paths = {r["path"] for r in sb.requests}
    assert paths and all("/namespaces/shop/" in p or "/namespaces/bank/" in p for p in paths), sorted(paths)
    watched = {r["path"] for r in _watches(sb)}
    kinds = ("deployments", "statefulsets", "horizontalpodautoscalers", "sizingpolicies")
    assert {p for p in watched if p.rsplit("/", 1)[1] in kinds} == {
        p for ns in ("shop", "bank") for p in watched if f"/namespaces/{ns}/" in p and p.rsplit("/", 1)[1] in kinds}
    assert len({p for p in watched if p.rsplit("/", 1)[1] in kinds}) == 8  # 4 kinds × 2 namespaces
    # pods only where a policy resizes in place (shop)
    assert {p for p in watched if p.endswith("/pods")} == {"/api/v1/namespaces/shop/pods"}
    assert _by_key(cache.list_policies().items) == _by_key(kube.list_policies(["shop", "bank"]).items)
    assert cache.list_policies(["shop"]).resource_version  # one namespace: a usable position
    assert cache.list_policies().resource_version == ""  # several: none (as the adapter)


def test_pods_of_in_place_workloads_follow_resizes_and_policy_changes(cluster, caches) -> None:
    sb, kube = cluster
    cache = caches(kube, namespaces=["shop", "bank"])
    web = cache.read_workload("shop", "Deployment", "web")
    assert [p.name for p in cache.list_pods(web)] == sorted(p.name for p in kube.list_pods(web))
    assert len(cache.list_pods(web)) == 2
    pod = cache.list_pods(web)[0]
    outcomes = kube.resize_pods([pod], {"app": CpuChange(request_m=600, limit_m=1000)})
    assert outcomes[0].ok
    eventually(lambda: next(p for p in cache.list_pods(web) if p.name == pod.name).containers[0].spec_cpu_request_m == 600,
               what="the resize in the cache")
    assert list(cache.list_pods(web)) == sorted(kube.list_pods(web), key=lambda p: p.name)
    # bank switches its policy to in-place: its pods are watched from then on; back: no longer
    merge = {"Content-Type": "application/merge-patch+json"}
    url = f"{sb.url}/apis/ratefit.dev/v1alpha1/namespaces/bank/sizingpolicies/web"
    httpx.patch(url, json={"spec": {"resizeBy": "InPlace"}}, headers=merge, timeout=10).raise_for_status()
    eventually(lambda: _watches(sb, "/namespaces/bank/pods"), what="a pod watch in bank")
    bank_web = cache.read_workload("bank", "Deployment", "web")
    eventually(lambda: list(cache.list_pods(bank_web)) == sorted(kube.list_pods(bank_web), key=lambda p: p.name),
               what="bank's pods")
    httpx.patch(url, json={"spec": {"resizeBy": "Rollout"}}, headers=merge, timeout=10).raise_for_status()
    eventually(lambda: "bank" not in cache._pods, what="the bank pod informer to stop")


def test_cached_values_are_frozen_and_copies_are_plain(cluster, caches) -> None:
    _, kube = cluster
    cache = caches(kube)
    pol = next(p for p in cache.list_policies(["shop"]).items if p.name == "web")
    assert isinstance(pol.spec, FrozenDict) and isinstance(pol.spec["containers"], FrozenList)
    with pytest.raises(TypeError, match="read-only"):
        pol.spec["mode"] = "Apply"  # type: ignore[index]
    with pytest.raises(TypeError, match="read-only"):
        pol.spec["containers"].append({})
    wl = cache.read_workload("shop", "Deployment", "web")
    with pytest.raises(TypeError):
        wl.annotations["x"] = "y"  # type: ignore[index]
    plain = copy.deepcopy(pol.spec)
    assert type(plain) is dict and type(plain["containers"]) is list and plain == pol.spec
    plain["mode"] = "DryRun"  # the copy is the caller's
    assert pol.spec["mode"] == "Apply"
    assert json.loads(json.dumps(pol.spec)) == plain | {"mode": "Apply"}
    # the policy parses exactly as the LISTed one does (pydantic takes the frozen values)
    listed = next(p for p in kube.list_policies(["shop"]).items if p.name == "web")
    assert parse_policy(policy_object_dict(pol)) == parse_policy(policy_object_dict(listed))


def test_an_unreadable_object_is_left_out_and_the_rest_served(cluster, caches) -> None:
    sb, kube = cluster
    cache = caches(kube)
    bad = copy.deepcopy(sb.store.get("apps", "deployments", "bank", "api"))
    bad["metadata"]["name"] = "broken"
    bad["spec"]["template"]["spec"]["containers"][0]["resources"] = {"requests": {"cpu": "lots"}}
    sb.store.save(("apps", "deployments"), bad, None)  # behind admission's back: a value no API server would store
    sb.create(deployment("bank", "fine", [("app", "100m", None)], replicas=0))
    eventually(lambda: any(w.name == "fine" for w in cache.list_workloads("Deployment")), what="the next object")
    assert all(w.name != "broken" for w in cache.list_workloads("Deployment"))
    assert cache.stats().per_resource["deployments"].bad_objects == 1


def test_reads_before_the_sync_are_refused_as_temporary(cluster) -> None:
    sb, kube = cluster
    sb.faults.add("GET", r"/apis/apps/v1/deployments$", latency=2.0, count=1)
    cache = KubeCache.for_adapter(kube).start()
    try:
        assert not cache.has_synced()
        with pytest.raises(CacheNotSynced) as err:
            cache.list_workloads("Deployment")
        assert err.value.temporary
        assert cache.wait_synced(20)
    finally:
        cache.stop()


def test_writes_are_remembered_and_a_conflict_rereads_from_the_server(cluster, caches) -> None:
    sb, kube = cluster
    cache = caches(kube)
    both = CachedKube(reader=cache, writer=kube)
    stale = both.read_workload("bank", "Deployment", "api")
    httpx.patch(f"{sb.url}/apis/apps/v1/namespaces/bank/deployments/api", json={"metadata": {"labels": {"team": "x"}}},
                headers={"Content-Type": "application/merge-patch+json"}, timeout=10).raise_for_status()
    eventually(lambda: cache.read_workload("bank", "Deployment", "api").resource_version != stale.resource_version,
               what="the label change")
    cache.remember(stale)  # as if the watch had not delivered it yet
    assert cache.read_workload("bank", "Deployment", "api") == stale
    with pytest.raises(KubeConflict):
        both.patch_cpu(stale, {"app": CpuChange(request_m=300)})
    fresh = both.read_workload("bank", "Deployment", "api")  # after the 409: from the API server
    assert fresh == kube.read_workload("bank", "Deployment", "api") and fresh != stale
    stored = both.patch_cpu(fresh, {"app": CpuChange(request_m=300)})
    # read-your-writes: never older than the write's answer (the sandbox's rollout may already
    # have written the status again, a later resourceVersion, by the time the cache is read)
    seen = both.read_workload("bank", "Deployment", "api")
    assert int(seen.resource_version) >= int(stored.resource_version)
    assert seen.containers == stored.containers
    assert stored.containers[0].cpu_request_m == 300


def test_stop_ends_every_thread_promptly(cluster) -> None:
    _, kube = cluster
    cache = KubeCache.for_adapter(kube, namespaces=["shop", "bank"], watch_timeout_s=600).start()
    assert cache.wait_synced(20)
    threads = [i for s in cache._informers.values() for i in s.values()] + list(cache._pods.values())
    cache.stop(timeout=10)
    # every thread ended within 10 s although each watch was asked to last 10-20 min:
    # the open streams are cut, not waited out
    assert threads and not any(i.alive for i in threads)


def test_the_resync_period_relists_and_keeps_serving(cluster, caches) -> None:
    sb, kube = cluster
    cache = caches(kube, namespaces=["bank"], resync_s=1.0)
    eventually(lambda: cache.stats().per_resource["deployments"].relists >= 1, what="a resync's relist")
    st = cache.stats().per_resource["deployments"]
    assert st.resyncs >= 1 and st.gone == 0 and st.errors == 0
    assert len(_lists(sb, "/namespaces/bank/deployments")) >= 2
    assert _by_key(cache.list_workloads("Deployment")) == _by_key(kube.list_workloads("Deployment", namespace="bank"))
