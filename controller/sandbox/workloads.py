"""The sandbox's built-in stand-ins for the workload controllers and the kubelet.

- Deployments: a template change makes a new ReplicaSet `<name>-<hash>` (label
  `pod-template-hash`), scales the old ones to zero and replaces their pods at once
  (no waiting unless a startup delay is set); pods are named `<name>-<hash>-<rand5>`.
- StatefulSets: pods `<name>-<ordinal>` with `controller-revision-hash`; on a template
  change, pods of the old revision are replaced highest ordinal first (all in one go).
- Pods: no scheduler, no kubelet — a pod is `Running` and Ready the moment it is stored,
  on node `sandbox-node`; `status.containerStatuses[].resources` mirrors the spec's
  resources (in-place resizes are applied at once).
- Workload status counters (replicas, updatedReplicas, readyReplicas,
  availableReplicas, observedGeneration, conditions) are written after every sync.
- Deleting an owner deletes what it owns (ownerReferences, background cascade).
- With `startup_seconds > 0` pods start Pending and turn Ready after that delay
  (`tick()`); Deployments then surge (old pods stay until all new ones are Ready) and
  StatefulSets replace one pod at a time, highest ordinal first.
"""

from __future__ import annotations

import copy
import time
from typing import Any

from ratefit.controller.sandbox import objects
from ratefit.controller.sandbox.store import Store
from ratefit.controller.sandbox.validation import (
    canonicalize_pod_spec,
    default_pod_requests,
    default_pod_spec,
    qos_class,
)

PODS = ("", "pods")
RS = ("apps", "replicasets")
DEPLOY = ("apps", "deployments")
STS = ("apps", "statefulsets")
NODE = "sandbox-node"


def container_statuses(pod: dict, previous: list[dict] | None = None) -> list[dict]:
    """What a kubelet would report: every container running with its spec's resources."""
    prev = {c.get("name"): c for c in previous or []}
    out = []
    for c in (pod.get("spec") or {}).get("containers") or []:
        res = copy.deepcopy(c.get("resources") or {})
        old = prev.get(c.get("name"), {})
        status = {
            "name": c.get("name"),
            "image": c.get("image"),
            "imageID": "",
            "containerID": old.get("containerID")
            or f"sandbox://{objects.rand_suffix(12)}",
            "ready": True,
            "started": True,
            "restartCount": old.get("restartCount", 0),
            "state": old.get("state") or {"running": {"startedAt": objects.now()}},
            "lastState": old.get("lastState", {}),
            "resources": {k: v for k, v in res.items() if k in ("requests", "limits")},
        }
        if res.get("requests"):
            status["allocatedResources"] = dict(res["requests"])
        out.append(status)
    return out


def finish_resize(pod: dict) -> None:
    """What the kubelet reports once a resize is actuated: status resources follow the
    spec; a container whose changed resource has `resizePolicy` RestartContainer restarts;
    the PodResizeInProgress condition goes away."""
    status = pod.setdefault("status", {})
    before = {c.get("name"): c for c in status.get("containerStatuses") or []}
    restarts = set()
    for c in (pod.get("spec") or {}).get("containers") or []:
        have = (before.get(c.get("name")) or {}).get("resources") or {}
        want = c.get("resources") or {}
        for pol in c.get("resizePolicy") or []:
            res = pol.get("resourceName")
            if pol.get("restartPolicy") == "RestartContainer" and any(
                    (have.get(part) or {}).get(res) != (want.get(part) or {}).get(res)
                    for part in ("requests", "limits")):
                restarts.add(c.get("name"))
    statuses = container_statuses(pod, status.get("containerStatuses"))
    for cs in statuses:
        if cs["name"] in restarts:
            cs["restartCount"] = cs.get("restartCount", 0) + 1
            cs["lastState"] = {"terminated": {"exitCode": 0, "reason": "Resized",
                                              "finishedAt": objects.now()}}
            cs["state"] = {"running": {"startedAt": objects.now()}}
    status["containerStatuses"] = statuses
    status["conditions"] = [c for c in status.get("conditions") or []
                            if c.get("type") != "PodResizeInProgress"]


def running_status(pod: dict) -> dict:
    t = objects.now()
    conds = [{"type": ty, "status": "True", "lastProbeTime": None, "lastTransitionTime": t}
             for ty in ("PodReadyToStartContainers", "Initialized", "Ready", "ContainersReady",
                        "PodScheduled")]
    ip = "10.244.%d.%d" % (hash(pod["metadata"]["name"]) % 250 + 1,
                           hash(pod["metadata"].get("namespace", "")) % 250 + 1)
    return {
        "phase": "Running",
        "conditions": conds,
        "hostIP": "10.0.0.1",
        "hostIPs": [{"ip": "10.0.0.1"}],
        "podIP": ip,
        "podIPs": [{"ip": ip}],
        "startTime": t,
        "qosClass": qos_class(pod.get("spec") or {}),
        "containerStatuses": container_statuses(pod),
        "observedGeneration": pod["metadata"].get("generation", 1),
    }


def pending_status(pod: dict) -> dict:
    """A pod whose containers are still being created (startup delay mode)."""
    status = running_status(pod)
    status["phase"] = "Pending"
    for c in status["conditions"]:
        if c["type"] in ("Ready", "ContainersReady"):
            c["status"] = "False"
            c["reason"] = "ContainersNotReady"
    status.pop("podIP")
    status.pop("podIPs")
    for cs in status["containerStatuses"]:
        cs.update(ready=False, started=False,
                  state={"waiting": {"reason": "ContainerCreating"}})
    return status


def is_ready(pod: dict) -> bool:
    st = pod.get("status") or {}
    return st.get("phase") == "Running" and any(
        c.get("type") == "Ready" and c.get("status") == "True" for c in st.get("conditions") or [])


def prepare_pod(pod: dict, *, pending: bool = False) -> None:
    """Defaulting a new pod gets and the status the (absent) kubelet would report."""
    spec = pod.setdefault("spec", {})
    default_pod_spec(spec)
    default_pod_requests(spec)
    spec.setdefault("nodeName", NODE)
    spec.setdefault("enableServiceLinks", True)
    spec.setdefault("priority", 0)
    pod["status"] = pending_status(pod) if pending else running_status(pod)


class Workloads:
    """Runs the built-in rollout after writes to Deployments, StatefulSets and pods."""

    def __init__(self, store: Store, *, startup_seconds: float = 0.0) -> None:
        self.store = store
        #: 0: pods are Running at once; > 0: pods start Pending and turn Ready after this
        #: many seconds (`tick()`), and rollouts wait for them (surge, then scale down)
        self.startup_seconds = startup_seconds
        self._pending: dict[tuple[str, str, str], float] = {}
        self._resizing: dict[tuple[str, str, str], float] = {}

    @property
    def delayed(self) -> bool:
        return self.startup_seconds > 0

    def after_pod_create(self, pod: dict) -> None:
        if (pod.get("status") or {}).get("phase") == "Pending":
            md = pod["metadata"]
            self._pending[(md.get("namespace", ""), md["name"], md["uid"])] = \
                time.monotonic() + self.startup_seconds

    def after_resize(self, pod: dict) -> None:
        if any(c.get("type") == "PodResizeInProgress"
               for c in (pod.get("status") or {}).get("conditions") or []):
            md = pod["metadata"]
            self._resizing[(md.get("namespace", ""), md["name"], md["uid"])] = \
                time.monotonic() + self.startup_seconds

    def tick(self, now: float | None = None) -> int:
        """Turn due Pending pods Running/Ready (and resync their owners) and finish due
        in-place resizes; returns how many pods changed."""
        now = time.monotonic() if now is None else now
        done = 0
        with self.store.lock:
            for key, due in sorted(self._resizing.items(), key=lambda kv: kv[1]):
                if due > now:
                    continue
                del self._resizing[key]
                pod = self.store.raw(PODS, key[0], key[1])
                if pod is None or pod["metadata"].get("uid") != key[2]:
                    continue
                new = copy.deepcopy(pod)
                finish_resize(new)
                self.store.save(PODS, new, pod)
                done += 1
            for key, due in sorted(self._pending.items(), key=lambda kv: kv[1]):
                if due > now:
                    continue
                del self._pending[key]
                ns, name, uid = key
                pod = self.store.raw(PODS, ns, name)
                if pod is None or pod["metadata"].get("uid") != uid:
                    continue
                new = copy.deepcopy(pod)
                started = (pod.get("status") or {}).get("startTime")
                new["status"] = running_status(new)
                if started:
                    new["status"]["startTime"] = started
                self.store.save(PODS, new, pod)
                done += 1
                self._resync_owners(new)
        return done

    def _resync_owners(self, pod: dict) -> None:
        ns = pod["metadata"].get("namespace", "")
        for ref in pod["metadata"].get("ownerReferences") or []:
            if ref.get("kind") == "StatefulSet":
                sts = self.store.raw(STS, ns, ref.get("name"))
                if sts is not None:
                    self.sync_statefulset(copy.deepcopy(sts))
            elif ref.get("kind") == "ReplicaSet":
                rs = self.store.raw(RS, ns, ref.get("name"))
                for dref in (rs or {}).get("metadata", {}).get("ownerReferences") or []:
                    dep = self.store.raw(DEPLOY, ns, dref.get("name"))
                    if dep is not None:
                        self.sync_deployment(copy.deepcopy(dep))
                if rs is not None and not rs["metadata"].get("ownerReferences"):
                    self.sync_replicaset(copy.deepcopy(rs))

    # --- helpers ------------------------------------------------------------------------
    def _create(self, key: tuple[str, str], obj: dict) -> dict:
        md = obj["metadata"]
        md.setdefault("uid", objects.new_uid())
        md.setdefault("creationTimestamp", objects.now())
        md.setdefault("generation", 1)
        return self.store.save(key, obj, None)

    def _update(self, key: tuple[str, str], obj: dict, old: dict) -> dict:
        if obj == old:
            return obj
        return self.store.save(key, obj, old)

    def delete_tree(self, key: tuple[str, str], namespace: str, name: str) -> dict | None:
        """Delete an object and, depth first, everything it owns."""
        gone = self.store.remove(key, namespace, name)
        if gone is None:
            return None
        uid = gone["metadata"].get("uid")
        if uid:
            for okey, ns, oname in self.store.dependent_keys(uid):
                self.delete_tree(okey, ns, oname)
        return gone

    def _new_pod(self, template: dict, *, namespace: str, name: str, labels: dict,
                 owner: dict) -> dict:
        tmeta = template.get("metadata") or {}
        pod = {
            "apiVersion": "v1",
            "kind": "Pod",
            "metadata": {
                "name": name,
                "namespace": namespace,
                "labels": labels,
                "ownerReferences": [objects.owner_ref(owner)],
            },
            "spec": copy.deepcopy(template.get("spec") or {}),
        }
        if tmeta.get("annotations"):
            pod["metadata"]["annotations"] = dict(tmeta["annotations"])
        canonicalize_pod_spec(pod["spec"])
        pod["metadata"]["uid"] = objects.new_uid()
        pod["metadata"]["creationTimestamp"] = objects.now()
        pod["metadata"]["generation"] = 1
        prepare_pod(pod, pending=self.delayed)
        saved = self.store.save(PODS, pod, None)
        self.after_pod_create(saved)
        return saved

    # --- entry points -------------------------------------------------------------------
    def after_write(self, key: tuple[str, str], obj: dict) -> None:
        if key == DEPLOY:
            self.sync_deployment(obj)
        elif key == STS:
            self.sync_statefulset(obj)
        elif key == RS:
            self.sync_replicaset(obj)

    def after_pod_delete(self, pod: dict) -> None:
        """A controller replaces a deleted pod of its workload."""
        ns = pod["metadata"].get("namespace", "")
        for ref in pod["metadata"].get("ownerReferences") or []:
            key = {"ReplicaSet": RS, "StatefulSet": STS}.get(ref.get("kind"))
            if key is None:
                continue
            owner = self.store.raw(key, ns, ref.get("name"))
            if owner is not None and owner["metadata"].get("uid") == ref.get("uid"):
                self.after_write(key, copy.deepcopy(owner))
                if key == RS:
                    for dref in owner["metadata"].get("ownerReferences") or []:
                        dep = self.store.raw(DEPLOY, ns, dref.get("name"))
                        if dep is not None:
                            self._deployment_status(copy.deepcopy(dep))

    # --- Deployments --------------------------------------------------------------------
    def sync_deployment(self, dep: dict) -> None:
        md, spec = dep["metadata"], dep.get("spec") or {}
        ns, name, uid = md.get("namespace", ""), md["name"], md["uid"]
        replicas = spec.get("replicas", 1)
        template = copy.deepcopy(spec.get("template") or {})
        h = objects.template_hash(template)
        rs_name = f"{name}-{h}"
        owned = [copy.deepcopy(rs) for rs in self.store.dependents(uid, RS)]
        revisions = [int((rs["metadata"].get("annotations") or {}).get(
            "deployment.kubernetes.io/revision", "0")) for rs in owned]
        current = next((rs for rs in owned if rs["metadata"]["name"] == rs_name), None)
        if current is None:
            labels = dict((template.get("metadata") or {}).get("labels") or {})
            labels["pod-template-hash"] = h
            rs_template = copy.deepcopy(template)
            rs_template.setdefault("metadata", {})["labels"] = labels
            selector = copy.deepcopy(spec.get("selector") or {})
            selector.setdefault("matchLabels", {})["pod-template-hash"] = h
            current = self._create(RS, {
                "apiVersion": "apps/v1",
                "kind": "ReplicaSet",
                "metadata": {
                    "name": rs_name,
                    "namespace": ns,
                    "labels": labels,
                    "annotations": {
                        "deployment.kubernetes.io/revision": str(max(revisions, default=0) + 1),
                        "deployment.kubernetes.io/desired-replicas": str(replicas),
                    },
                    "ownerReferences": [objects.owner_ref(dep)],
                },
                "spec": {"replicas": replicas, "selector": selector, "template": rs_template},
            })
        elif current["spec"].get("replicas") != replicas:
            new = copy.deepcopy(current)
            new["spec"]["replicas"] = replicas
            new["metadata"]["generation"] = new["metadata"].get("generation", 1) + 1
            current = self._update(RS, new, current)
        self.sync_replicaset(current)
        new_pods = self.store.dependents(current["metadata"]["uid"], PODS)
        settled = not self.delayed or (len(new_pods) >= replicas
                                       and all(is_ready(p) for p in new_pods))
        for rs in owned:
            if rs["metadata"]["name"] != rs_name and rs["spec"].get("replicas", 0) != 0 \
                    and settled:
                new = copy.deepcopy(rs)
                new["spec"]["replicas"] = 0
                new["metadata"]["generation"] = new["metadata"].get("generation", 1) + 1
                self.sync_replicaset(self._update(RS, new, rs))
        limit = spec.get("revisionHistoryLimit", 10)
        old = sorted((rs for rs in self.store.dependents(uid, RS)
                      if rs["metadata"]["name"] != rs_name),
                     key=lambda r: int(r["metadata"]["annotations"].get(
                         "deployment.kubernetes.io/revision", "0")))
        for rs in old[:max(0, len(old) - limit)]:
            self.delete_tree(RS, ns, rs["metadata"]["name"])
        fresh = self.store.raw(DEPLOY, ns, name)
        if fresh is not None:
            self._deployment_status(copy.deepcopy(fresh))

    def _deployment_status(self, dep: dict) -> None:
        md = dep["metadata"]
        ns, uid = md.get("namespace", ""), md["uid"]
        h = objects.template_hash((dep.get("spec") or {}).get("template") or {})
        total = updated = ready = 0
        for rs in self.store.dependents(uid, RS):
            pods = self.store.dependents(rs["metadata"]["uid"], PODS)
            total += len(pods)
            ready += sum(1 for p in pods if is_ready(p))
            if rs["metadata"]["name"].endswith(f"-{h}"):
                updated += len(pods)
                new_ready = sum(1 for p in pods if is_ready(p))
                new_rs = rs["metadata"]["name"]
        spec = dep.get("spec") or {}
        want = spec.get("replicas", 1)
        old_status = dep.get("status") or {}
        t = objects.now()
        max_unavailable = ((spec.get("strategy") or {}).get("rollingUpdate") or {}).get(
            "maxUnavailable", "25%")
        if isinstance(max_unavailable, str) and max_unavailable.endswith("%"):
            max_unavailable = want * int(max_unavailable[:-1] or 0) // 100
        elif not isinstance(max_unavailable, int):
            max_unavailable = 0
        rolled = updated >= want and total <= updated and locals().get("new_ready", 0) >= want

        def cond(ty: str, ok: bool, reason: str, message: str) -> dict:
            prev = next((c for c in old_status.get("conditions") or [] if c.get("type") == ty),
                        None)
            state = "True" if ok else "False"
            same = prev and prev.get("status") == state
            return {"type": ty, "status": state,
                    "lastUpdateTime": prev["lastUpdateTime"]
                    if same and prev.get("reason") == reason else t,
                    "lastTransitionTime": prev["lastTransitionTime"] if same else t,
                    "reason": reason, "message": message}

        available = ready >= want - max_unavailable
        rs_name = locals().get("new_rs", md["name"])

        status: dict[str, Any] = {
            "observedGeneration": md.get("generation", 1),
            "replicas": total,
            "updatedReplicas": updated,
            "readyReplicas": ready,
            "availableReplicas": ready,
            "conditions": [
                cond("Available", True, "MinimumReplicasAvailable",
                     "Deployment has minimum availability.") if available else
                cond("Available", False, "MinimumReplicasUnavailable",
                     "Deployment does not have minimum availability."),
                cond("Progressing", True, "NewReplicaSetAvailable",
                     f'ReplicaSet "{rs_name}" has successfully progressed.') if rolled else
                cond("Progressing", True, "ReplicaSetUpdated",
                     f'ReplicaSet "{rs_name}" is progressing.'),
            ],
        }
        if want - ready > 0:
            status["unavailableReplicas"] = want - ready
        for k in ("readyReplicas", "availableReplicas", "updatedReplicas", "replicas"):
            if status[k] == 0:
                del status[k]
        if status != old_status:
            new = copy.deepcopy(dep)
            new["status"] = status
            self.store.save(DEPLOY, new, dep)

    def sync_replicaset(self, rs: dict) -> None:
        md = rs["metadata"]
        ns, uid = md.get("namespace", ""), md["uid"]
        want = (rs.get("spec") or {}).get("replicas", 1)
        pods = list(self.store.dependents(uid, PODS))
        for p in sorted(pods, key=lambda p: p["metadata"]["creationTimestamp"],
                        reverse=True)[:max(0, len(pods) - want)]:
            self.store.remove(PODS, ns, p["metadata"]["name"])
        template = (rs.get("spec") or {}).get("template") or {}
        labels = dict((template.get("metadata") or {}).get("labels") or {})
        for _ in range(max(0, want - len(pods))):
            name = f"{md['name']}-{objects.rand_suffix()}"
            while self.store.raw(PODS, ns, name) is not None:
                name = f"{md['name']}-{objects.rand_suffix()}"
            self._new_pod(template, namespace=ns, name=name, labels=dict(labels), owner=rs)
        pods = self.store.dependents(uid, PODS)
        count = len(pods)
        ready = sum(1 for p in pods if is_ready(p))
        fresh = self.store.raw(RS, ns, md["name"])
        if fresh is None:
            return
        status = {"replicas": count, "fullyLabeledReplicas": count, "readyReplicas": ready,
                  "availableReplicas": ready,
                  "observedGeneration": fresh["metadata"].get("generation", 1)}
        status = {k: v for k, v in status.items() if v or k == "replicas"}
        if fresh.get("status") != status:
            new = copy.deepcopy(fresh)
            new["status"] = status
            self.store.save(RS, new, fresh)

    # --- StatefulSets -------------------------------------------------------------------
    def sync_statefulset(self, sts: dict) -> None:
        md, spec = sts["metadata"], sts.get("spec") or {}
        ns, name = md.get("namespace", ""), md["name"]
        replicas = spec.get("replicas", 1)
        template = copy.deepcopy(spec.get("template") or {})
        rev = f"{name}-{objects.template_hash(template)}"
        ordinals = {}
        for p in self.store.dependents(md["uid"], PODS):
            suffix = p["metadata"]["name"][len(name) + 1:]
            if suffix.isdigit():
                ordinals[int(suffix)] = p
        for i in sorted(ordinals, reverse=True):
            if i >= replicas:
                self.store.remove(PODS, ns, ordinals.pop(i)["metadata"]["name"])
        old_rev = next((p["metadata"].get("labels", {}).get("controller-revision-hash")
                        for p in ordinals.values()
                        if p["metadata"].get("labels", {}).get("controller-revision-hash")
                        != rev), None)
        stale = [i for i in sorted(ordinals, reverse=True)
                 if ordinals[i]["metadata"].get("labels", {}).get("controller-revision-hash")
                 != rev]
        all_ready = all(is_ready(p) for p in ordinals.values())
        # without a startup delay everything is replaced at once; with one, like
        # OrderedReady + RollingUpdate: one pod at a time, highest ordinal first
        for i in (stale if not self.delayed else stale[:1] if all_ready else []):
            self.store.remove(PODS, ns, ordinals.pop(i)["metadata"]["name"])
        for i in range(replicas):
            if i in ordinals:
                continue
            if self.delayed and not all(is_ready(p) for p in ordinals.values()):
                break
            if self.delayed and any(j not in ordinals for j in range(i)):
                break
            labels = dict((template.get("metadata") or {}).get("labels") or {})
            labels.update({"controller-revision-hash": rev,
                           "statefulset.kubernetes.io/pod-name": f"{name}-{i}",
                           "apps.kubernetes.io/pod-index": str(i)})
            ordinals[i] = self._new_pod(template, namespace=ns, name=f"{name}-{i}",
                                        labels=labels, owner=sts)
        fresh = self.store.raw(STS, ns, name)
        if fresh is None:
            return
        pods = self.store.dependents(md["uid"], PODS)
        count = len(pods)
        ready = sum(1 for p in pods if is_ready(p))
        updated = sum(1 for p in pods
                      if p["metadata"].get("labels", {}).get("controller-revision-hash") == rev)
        done = updated == count == replicas
        status = {"observedGeneration": fresh["metadata"].get("generation", 1),
                  "replicas": count, "readyReplicas": ready,
                  "currentReplicas": count if done else count - updated,
                  "updatedReplicas": updated, "availableReplicas": ready,
                  "currentRevision": rev if done or not old_rev else old_rev,
                  "updateRevision": rev, "collisionCount": 0}
        status = {k: v for k, v in status.items() if v != 0 or k in ("replicas",
                                                                        "collisionCount")}
        if fresh.get("status") != status:
            new = copy.deepcopy(fresh)
            new["status"] = status
            self.store.save(STS, new, fresh)
