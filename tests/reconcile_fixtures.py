"""A small real world for reconcile tests: the sandbox API server, a real ``ratefit serve``
over a store of closed-form curves, and a rate history replayed by the real replay
source (or served by the real Prometheus).

INVENTED test scenario: namespaces ``shop``/``bank``, workloads ``web``, ``api``… — made up.

- :func:`linear_artifact` curves are ``cpu = base + slope × rate`` cores with a fixed
  band, so a test knows demand and upper at any rate without training anything.
- :func:`write_history` writes OpenMetrics counters ``http_requests_total{namespace,
  workload,pod}`` that grow at a constant per-pod rate, so the per-pod rate (and any
  percentile of it) is that constant.
- :func:`deployment`, :func:`statefulset`, :func:`policy`, :func:`hpa` build manifests.
- :class:`World` starts everything (always stopped on exit) and offers raw reads.
"""

from __future__ import annotations

import contextlib
import math
import time
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import httpx
import pytest

from api_fixtures import make_artifact, serve_process
from ratefit.models.store import ModelStore

CRD = Path(__file__).resolve().parent.parent / "manifests" / "crd" / "sizingpolicy.yaml"


def ceil5(x: float) -> int:
    """Round up to a multiple of 5m (DESIGN.md "One decision", step 3)."""
    return int(math.ceil(x / 5.0 - 1e-9)) * 5


def write_history(path: Path, rates: Mapping[tuple[str, str], Sequence[float]], *, end: float,
                  minutes: int = 90, step_s: int = 30, metric: str = "http_requests_total",
                  statefulsets: frozenset[tuple[str, str]] | set[tuple[str, str]] = frozenset()) -> Path:
    """Constant-rate counters: per (namespace, workload) one series per pod at the given rates.
    OpenMetrics text format (openmetrics.io spec: counters end in _total, '# EOF' last).
    Pods are named as Kubernetes names them: ``<name>-<ordinal>`` for the (namespace, name)
    pairs in ``statefulsets``, a Deployment's ``<name>-<hash>-<5 random>`` otherwise."""
    base = metric.removesuffix("_total")
    lines = [f"# HELP {base} Requests served (INVENTED test scenario).", f"# TYPE {base} counter"]
    start = end - minutes * 60
    ts = [start + i * step_s for i in range(int(minutes * 60 / step_s) + 1)]
    for (ns, wl), pod_rates in sorted(rates.items()):
        for i, r in enumerate(pod_rates):
            # a Deployment's pod name (<name>-<pod-template-hash>-<5 random>): the controller maps
            # pods to workloads by name (controller/pod_names); the alphabet is Kubernetes' own
            pod = f"{wl}-{i}" if (ns, wl) in statefulsets else f"{wl}-5d4c7b9f8-{'bcdfghjklmnpqrstvwxz2456789'[i % 27] * 5}"
            labels = f'namespace="{ns}",pod="{pod}",workload="{wl}"'
            lines += [f"{metric}{{{labels}}} {r * (t - start):.6f} {t:.3f}" for t in ts]
    lines.append("# EOF")
    path.write_text("\n".join(lines) + "\n")
    return path


def _resources(req: str | None, lim: str | None) -> dict[str, Any]:
    res: dict[str, Any] = {}
    if req is not None:
        res["requests"] = {"cpu": req, "memory": "64Mi"}
    if lim is not None:
        res["limits"] = {"cpu": lim}
    return res


def _workload(kind: str, ns: str, name: str, containers: Sequence[tuple[str, str | None, str | None]],
              replicas: int) -> dict[str, Any]:
    spec: dict[str, Any] = {
        "replicas": replicas,
        "selector": {"matchLabels": {"app": name}},
        "template": {
            "metadata": {"labels": {"app": name}},
            "spec": {"containers": [
                {"name": c, "image": "registry.invalid/kestrel/" + c + ":1", "resources": _resources(req, lim),
                 "env": [{"name": "MODE", "value": "test"}]}
                for c, req, lim in containers
            ]},
        },
    }
    if kind == "StatefulSet":
        spec["serviceName"] = name
    return {"apiVersion": "apps/v1", "kind": kind, "metadata": {"name": name, "namespace": ns}, "spec": spec}


def deployment(ns: str, name: str, containers: Sequence[tuple[str, str | None, str | None]], *,
               replicas: int = 2) -> dict[str, Any]:
    return _workload("Deployment", ns, name, containers, replicas)


def statefulset(ns: str, name: str, containers: Sequence[tuple[str, str | None, str | None]], *,
                replicas: int = 2) -> dict[str, Any]:
    return _workload("StatefulSet", ns, name, containers, replicas)


def policy(ns: str, name: str, *, workload: str, kind: str = "Deployment", containers: Sequence[Mapping[str, Any]],
           mode: str = "Apply", **spec: Any) -> dict[str, Any]:
    body: dict[str, Any] = {
        "workload": {"kind": kind, "name": workload},
        "mode": mode,
        "containers": [dict(c) for c in containers],
        "headroomPercent": 15,
        "deadbandPercent": 10,
        "cooldown": "30m",
        "settle": "0s",
        "stepLimit": {"maxIncreasePercent": 900, "maxDecreasePercent": 90},
        "rateWindow": "1h",
        "ratePercentile": 95,
        "cpuLimit": "KeepRatio",
    }
    body.update(spec)
    return {"apiVersion": "ratefit.dev/v1alpha1", "kind": "SizingPolicy",
            "metadata": {"name": name, "namespace": ns}, "spec": body}


def hpa(ns: str, name: str, *, target: str, cpu_utilization: bool = True) -> dict[str, Any]:
    metric = ({"type": "Resource", "resource": {"name": "cpu", "target": {"type": "Utilization", "averageUtilization": 70}}}
              if cpu_utilization else
              {"type": "Pods", "pods": {"metric": {"name": "http_requests"}, "target": {"type": "AverageValue", "averageValue": "100"}}})
    return {"apiVersion": "autoscaling/v2", "kind": "HorizontalPodAutoscaler",
            "metadata": {"name": name, "namespace": ns},
            "spec": {"scaleTargetRef": {"apiVersion": "apps/v1", "kind": "Deployment", "name": target},
                     "minReplicas": 1, "maxReplicas": 10, "metrics": [metric]}}


@dataclass
class World:
    sandbox: Any
    kubeconfig: Path
    history: Path
    at: float
    api_url: str
    tmp: Path
    _closers: list[Any] = field(default_factory=list)

    # -- clients ----------------------------------------------------------------------
    def kube(self, **kwargs: Any) -> Any:
        from ratefit.controller.kube import KubeAdapter

        kwargs.setdefault("identity", "test-controller")
        kwargs.setdefault("sleep", lambda s: None)  # retries without real waiting
        k = KubeAdapter.from_kubeconfig(str(self.kubeconfig), **kwargs)
        self._closers.append(k)
        return k

    def rates(self) -> Any:
        from ratefit.controller.metrics_source import ReplayRateSource

        return ReplayRateSource(self.history, at=self.at)

    def sizing(self, url: str | None = None, **kwargs: Any) -> Any:
        from ratefit.controller.sizing_client import SizingClient

        kwargs.setdefault("timeout", 10.0)
        c = SizingClient(url or self.api_url, **kwargs)
        self._closers.append(c)
        return c

    def reconciler(self, *, kube: Any = None, rates: Any = None, sizing: Any = None, **kwargs: Any) -> Any:
        from ratefit.controller.reconcile import ReconcileConfig, Reconciler

        cfg = {k: kwargs.pop(k) for k in ("dry_run", "write", "namespaces", "identity", "conflict_attempts", "shard") if k in kwargs}
        return Reconciler(kube=kube or self.kube(), rates=rates or self.rates(), sizing=sizing or self.sizing(),
                          config=ReconcileConfig(**cfg), **kwargs)

    # -- raw reads (what the tests assert on) -------------------------------------------
    def get(self, path: str) -> dict[str, Any]:
        r = httpx.get(self.sandbox.url + path, timeout=10.0)
        r.raise_for_status()
        return r.json()

    def workload(self, ns: str, name: str, kind: str = "deployments") -> dict[str, Any]:
        return self.get(f"/apis/apps/v1/namespaces/{ns}/{kind}/{name}")

    def cpu(self, ns: str, name: str, container: str, kind: str = "deployments") -> tuple[str | None, str | None]:
        obj = self.workload(ns, name, kind)
        for c in obj["spec"]["template"]["spec"]["containers"]:
            if c["name"] == container:
                res = c.get("resources") or {}
                return (res.get("requests") or {}).get("cpu"), (res.get("limits") or {}).get("cpu")
        raise KeyError(container)

    def sizing_policy(self, ns: str, name: str) -> dict[str, Any]:
        return self.get(f"/apis/ratefit.dev/v1alpha1/namespaces/{ns}/sizingpolicies/{name}")

    def events(self, ns: str) -> list[dict[str, Any]]:
        return self.get(f"/apis/events.k8s.io/v1/namespaces/{ns}/events")["items"]

    def resource_versions(self) -> dict[str, str]:
        """Every object the controller may touch → its resourceVersion (and the event count)."""
        out: dict[str, str] = {}
        for path in ("/apis/apps/v1/deployments", "/apis/apps/v1/statefulsets", "/api/v1/pods",
                     "/apis/ratefit.dev/v1alpha1/sizingpolicies", "/apis/autoscaling/v2/horizontalpodautoscalers",
                     "/apis/coordination.k8s.io/v1/leases"):
            for o in self.get(path)["items"]:
                m = o["metadata"]
                out[f"{path}/{m.get('namespace')}/{m['name']}"] = m["resourceVersion"]
        out["events"] = str(len(self.get("/apis/events.k8s.io/v1/events")["items"]))
        return out

    def patches(self, ns: str, name: str, kind: str = "deployments") -> list[dict[str, Any]]:
        """The non-dry-run PATCH requests the sandbox served for one workload."""
        path = f"/apis/apps/v1/namespaces/{ns}/{kind}/{name}"
        return [r for r in list(self.sandbox.requests)
                if r["method"] == "PATCH" and r["path"] == path and r["query"].get("dryRun") != "All"]


#: the curve every reconcile test uses: cpu = 0.05 + 0.004 × rate cores, band 0.02 cores
LINEAR = {"base": 0.05, "slope": 0.004, "band": 0.02}
#: the keys the shared sizing API serves (``shop/web/other`` stays unknown on purpose)
SHARED_KEYS = ("shop/web/app", "shop/web/side", "shop/api/app", "shop/a/app", "shop/b/app", "shop/c/app")


@pytest.fixture(scope="session")
def shared_sizing_api(tmp_path_factory: pytest.TempPathFactory) -> Iterator[str]:
    """One real ``ratefit serve`` for the whole session over :data:`SHARED_KEYS` with the
    :data:`LINEAR` curve (saves starting a server per test); stopped at the end."""
    tmp = tmp_path_factory.mktemp("shared-sizing-api")
    store = ModelStore(tmp / "store")
    for key in SHARED_KEYS:
        store.save(make_artifact(key, **LINEAR))
    with serve_process(tmp / "store", workdir=tmp) as api:
        yield api.base_url


@contextlib.contextmanager
def world(tmp: Path, *, objects: Sequence[Mapping[str, Any]], rates: Mapping[tuple[str, str], Sequence[float]],
          models: Mapping[str, Mapping[str, float]] | None = None, api_url: str | None = None,
          end: float | None = None, sandbox: Mapping[str, Any] | None = None) -> Iterator[World]:
    """Start the sandbox (CRD + ``objects``) and write the rate history. The sizing API is
    ``api_url`` (e.g. the session's :func:`shared_sizing_api`) or, given ``models``, a real
    ``ratefit serve`` of its own with one linear curve per key (make_artifact kwargs)."""
    from ratefit.controller.sandbox import SandboxServer

    at = float(int(end if end is not None else time.time() - 120))
    statefulsets = {(o["metadata"]["namespace"], o["metadata"]["name"]) for o in objects if o.get("kind") == "StatefulSet"}
    history = write_history(tmp / "history.om", rates, end=at, statefulsets=statefulsets)
    with contextlib.ExitStack() as stack:
        if api_url is None:
            store = ModelStore(tmp / "store")
            for key, kw in (models or {}).items():
                store.save(make_artifact(key, **kw))
            api_url = stack.enter_context(serve_process(tmp / "store", workdir=tmp)).base_url
        sb = SandboxServer(host="127.0.0.1", port=0, load=[CRD], **dict(sandbox or {})).start()
        stack.callback(sb.stop)
        for obj in objects:
            sb.create(dict(obj))
        kc = sb.write_kubeconfig(tmp / "kubeconfig")
        w = World(sandbox=sb, kubeconfig=kc, history=history, at=at, api_url=api_url, tmp=tmp)
        try:
            yield w
        finally:
            for c in w._closers:
                with contextlib.suppress(Exception):
                    c.close()


@dataclass
class RunningController:
    """A real `ratefit run` process over a :class:`World` (see :func:`running_controller`)."""

    proc: Any
    log: Path
    #: the health server's base URL (None with --metrics-port -1)
    url: str | None = None
    #: the exit code after SIGTERM (set when the block ends)
    code: int | None = None

    def log_text(self) -> str:
        return self.log.read_text()


@contextlib.contextmanager
def running_controller(w: World, *extra: str, health: bool = True, timeout: float = 60.0) -> Iterator[RunningController]:
    """`ratefit run` against the world's sandbox, history and sizing API, without leader
    election, plus ``extra`` flags. With ``health`` the health server listens on a free port
    and the block starts once its URL is logged. The process is always stopped at the end:
    SIGTERM, at most 30 s to exit (its code in ``code``), then by its PID
    (``local_servers.stop_process``) whatever happened."""
    import re
    import signal
    import subprocess
    import sys

    from ratefit.controller.local_servers import stop_process

    ratefit = Path(sys.executable).with_name("ratefit")
    log_path = w.tmp / "run.log"
    cmd = [str(ratefit), "run", "--kubeconfig", str(w.kubeconfig), "--replay", str(w.history), "--rate-at", str(w.at),
           "--sizing-api", w.api_url, "--no-leader-election", "--metrics-port", "0" if health else "-1", *extra]
    log = open(log_path, "w")
    proc = subprocess.Popen(cmd, stdout=log, stderr=subprocess.STDOUT, start_new_session=True)
    run = RunningController(proc=proc, log=log_path)
    try:
        deadline = time.monotonic() + timeout
        while health and run.url is None:
            assert time.monotonic() < deadline and proc.poll() is None, run.log_text()[-3000:]
            m = re.search(r"/readyz on (http://\S+)", run.log_text())
            run.url = m.group(1) if m else None
            time.sleep(0.05)
        yield run
    finally:
        proc.send_signal(signal.SIGTERM)
        try:
            run.code = proc.wait(timeout=30)
        except subprocess.TimeoutExpired:
            pass
        finally:
            stop_process(proc)
            log.close()
