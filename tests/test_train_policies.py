"""`ratefit train --from-policies` against the real Prometheus (history backfilled with
promtool, tests/cluster_history.py) and the sandbox API server with the real kubectl.

What is checked, and against what:

* exactly the models the SizingPolicies name are trained — no other key appears in the
  store and a model no policy names is left byte for byte as it was;
* each model learns from its own workload's pods only, for names that could fool a
  pattern (``api`` / ``api-v2``, ``db`` / ``db-1`` StatefulSets, ``web-12345``; Kubernetes
  docs: a Deployment's pods are ``<name>-<pod-template-hash>-<5 chars>``, a StatefulSet's
  ``<name>-<ordinal>``), never from another namespace's series — seen in each model's
  trained rate range;
* the curve found is the Utilization Law line the history follows (U = X * S, Denning &
  Buzen 1978): cores at the middle of the trained range within 5 % of 0.020 + 0.004 X;
* a model whose pods have no series fails with the queries in its reason, a policy whose
  rateQuery reads another namespace is listed, and the others still train (exit 1);
* a fresh model is skipped, a stale one (older than --max-age) and a corrupt one are
  retrained;
* --shard I/N splits the keys disjointly and completely (also auto/N from
  JOB_COMPLETION_INDEX, the variable Kubernetes sets in an Indexed Job's pods — Kubernetes
  docs, "Jobs: completion mode").

INVENTED data (Kestrel Post naming).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import time
from pathlib import Path

import pytest
import yaml

from cluster_history import OTHER_NS, expected_cpu, write_history
from ratefit.controller.train_policies import (
    PolicySource,
    parse_shard,
    plan_training,
    read_policy_files,
    shard_index,
)
from ratefit.models.errors import InputError
from ratefit.models.store import ModelStore

REPO = Path(__file__).resolve().parents[1]
RATEFIT = Path(sys.executable).with_name("ratefit")
NS = "shop"

#: (namespace, pod) → (container, base req/s)
PODS = {
    (NS, "api-7d9f8b6c5d-x2k9p"): ("app", 20.0),
    (NS, "api-7d9f8b6c5d-b4zqr"): ("app", 30.0),
    (NS, "api-v2-5f6c7d8b9-q2w4r"): ("app", 40.0),
    (NS, "web-12345-6b7c8d9f5-vv2cx"): ("web", 25.0),
    (NS, "db-0"): ("db", 10.0),
    (NS, "db-1"): ("db", 12.0),
    (NS, "db-1-0"): ("db", 50.0),
    (NS, "db-1-1"): ("db", 55.0),
}
#: policy name → (kind, workload, container)
POLICIES = {
    "api": ("Deployment", "api", "app"),
    "api-v2": ("Deployment", "api-v2", "app"),
    "web-12345": ("Deployment", "web-12345", "web"),
    "db": ("StatefulSet", "db", "db"),
    "db-1": ("StatefulSet", "db-1", "db"),
    "ghost": ("Deployment", "ghost", "app"),  # no series at all
}
GOOD = {f"{NS}/{w}/{c}" for (_, w, c) in POLICIES.values() if w != "ghost"}
GHOST = f"{NS}/ghost/app"
#: the swing of the rate around each pod's base (cluster_history: base * (1 ± 0.5))
LO, HI = 0.5, 1.5


def policy_docs() -> list[dict]:
    docs = [{
        "apiVersion": "ratefit.dev/v1alpha1", "kind": "SizingPolicy",
        "metadata": {"name": name, "namespace": NS},
        "spec": {"workload": {"kind": kind, "name": wl}, "mode": "DryRun",
                 "containers": [{"name": c, "model": f"{NS}/{wl}/{c}"}]},
    } for name, (kind, wl, c) in POLICIES.items()]
    # a policy in another namespace whose own rateQuery reads shop's series: refused
    docs.append({
        "apiVersion": "ratefit.dev/v1alpha1", "kind": "SizingPolicy",
        "metadata": {"name": "sneaky", "namespace": OTHER_NS},
        "spec": {"workload": {"kind": "Deployment", "name": "api"},
                 "containers": [{"name": "app", "model": f"{OTHER_NS}/api/app",
                                 "rateQuery": f'sum by (namespace, pod) (rate(http_requests_total{{namespace="{NS}"}}[2m]))'}]},
    })
    return docs


def write_policies(path: Path) -> Path:
    other = {"apiVersion": "v1", "kind": "ConfigMap", "metadata": {"name": "not-a-policy", "namespace": NS}}
    path.write_text(yaml.safe_dump_all([other, *policy_docs()], sort_keys=False))
    return path


@pytest.fixture(scope="module")
def prom(tmp_path_factory):
    from prom_fixtures import backfill, run_prometheus

    base = tmp_path_factory.mktemp("train-policies")
    end = float(int(time.time()) - 600)
    end -= end % 15
    backfill(write_history(base / "history.om", PODS, end=end), base / "tsdb")
    with run_prometheus(base / "tsdb") as srv:
        yield srv.url, end


def train(*args: str, env: dict | None = None) -> tuple[int, dict, str]:
    """`ratefit train --from-policies …` in a subprocess (the real CLI) → (exit, JSON summary, stderr)."""
    proc = subprocess.run([str(RATEFIT), "train", "--from-policies", "--estimators", "linear", "--output", "json",
                           *args], capture_output=True, text=True, timeout=600,
                          env={**os.environ, **(env or {})})
    try:
        doc = json.loads(proc.stdout) if proc.stdout.strip() else {}
    except ValueError:
        raise AssertionError(f"not JSON: {proc.stdout[-2000:]}\n{proc.stderr[-2000:]}") from None
    return proc.returncode, doc, proc.stderr


def prom_args(prom, store: Path) -> list[str]:
    url, end = prom
    return ["--prometheus", url, "--end", str(end), "--lookback", "2h", "--step", "60s", "--store", str(store)]


def rows(doc: dict) -> dict[str, dict]:
    return {m["model"]: m for m in doc["models"]}


@pytest.mark.prometheus
def test_trains_exactly_the_models_the_cluster_policies_name(prom, sandbox_kubeconfig, kubectl, tmp_path):
    kubectl("apply", "-f", str(REPO / "manifests" / "crd" / "sizingpolicy.yaml"), check=True)
    namespaces = [{"apiVersion": "v1", "kind": "Namespace", "metadata": {"name": n}} for n in (NS, OTHER_NS)]
    kubectl("apply", "-f", "-", input=yaml.safe_dump_all(namespaces), check=True)
    kubectl("apply", "-f", str(write_policies(tmp_path / "policies.yaml")), check=True)
    store = tmp_path / "models"
    # a model no policy names, trained earlier: must stay exactly as it is
    retired = ModelStore(store).path_for("shop/retired/app")
    retired.parent.mkdir(parents=True)
    retired.write_text("{not even json, and never read}")
    code, doc, err = train(*prom_args(prom, store), "--kubeconfig", str(sandbox_kubeconfig), "--jobs", "2")
    assert code == 1, err  # some failed, the others trained
    got = rows(doc)
    assert set(got) == GOOD | {GHOST}  # the models named in shop (bank's was refused)
    assert {m for m, r in got.items() if r["result"] == "trained"} == GOOD
    assert sorted(ModelStore(store).keys()) == sorted(GOOD | {"shop/retired/app"})
    assert retired.read_text() == "{not even json, and never read}"
    # the pod without series: failed, with the queries in its reason
    assert got[GHOST]["result"] == "failed"
    assert "no samples" in got[GHOST]["detail"] and 'pod=~"' in got[GHOST]["detail"]
    # the policy reading another namespace: listed, with the namespace in the message
    (problem,) = doc["problems"]
    assert problem["policy"] == f"{OTHER_NS}/sneaky" and f'namespace="{NS}"' in problem["message"]
    assert doc["counts"] == {"trained": len(GOOD), "up-to-date": 0, "failed": 1, "policy_problems": 1}
    # progress on stderr without a TTY: one line per model trained or failed
    assert err.count("train [") == len(GOOD) + 1
    # each workload's own pods, never a neighbour's nor another namespace's
    for model, r in got.items():
        if r["result"] != "trained":
            continue
        wl = model.split("/")[1]
        bases = [b for (ns, pod), (_, b) in PODS.items() if _owner(pod) == wl]
        lo, hi = r["rate_range"]
        assert min(bases) * LO * 0.97 <= lo and hi <= max(bases) * HI * 1.03, (model, lo, hi, bases)
        assert r["samples_used"] > 0 and r["estimator"] == "linear"
        assert r["cv_rmse_cores"] < r["baseline_rmse_cores"]
    # the Utilization Law line (U = X * S plus the idle floor), at the middle of the range
    for model in GOOD:
        art = ModelStore(store).load(model)
        mid = sum(art.rate_range) / 2
        got_cpu, _, _ = art.demand_curve().lookup_one(mid)
        assert got_cpu == pytest.approx(expected_cpu(mid), rel=0.05), model


def _owner(pod: str) -> str:
    """The workload of a pod in PODS (the test's own ground truth, written by hand)."""
    return {"api-7d9f8b6c5d-x2k9p": "api", "api-7d9f8b6c5d-b4zqr": "api", "api-v2-5f6c7d8b9-q2w4r": "api-v2",
            "web-12345-6b7c8d9f5-vv2cx": "web-12345", "db-0": "db", "db-1": "db", "db-1-0": "db-1",
            "db-1-1": "db-1"}[pod]


@pytest.mark.prometheus
def test_fresh_models_are_skipped_stale_and_corrupt_ones_retrained(prom, tmp_path):
    policies = write_policies(tmp_path / "policies.yaml")
    store = tmp_path / "models"
    code, first, _ = train(*prom_args(prom, store), "-f", str(policies), "--jobs", "1")
    assert code == 1 and {m for m, r in rows(first).items() if r["result"] == "trained"} == GOOD
    hashes = {k: ModelStore(store).load(k).content_hash for k in GOOD}
    # again within --max-age: nothing is trained, nothing changes
    code, again, err = train(*prom_args(prom, store), "-f", str(policies))
    assert {m for m, r in rows(again).items() if r["result"] == "up-to-date"} == GOOD
    assert {k: ModelStore(store).load(k).content_hash for k in GOOD} == hashes
    assert rows(again)[GHOST]["result"] == "failed" and "1 to train" in err  # the ghost is tried again
    # one model trained 8 days ago, one file corrupted: exactly those two are retrained
    ms = ModelStore(store)
    old = ms.load("shop/api/app")
    stamp = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(time.time() - 8 * 86400))
    ms.save(old.model_copy(update={"trained_at": stamp, "content_hash": ""}).sealed())
    ms.path_for("shop/db/db").write_text('{"schema": "ratefit.dev/demand-curve/v1", "truncated')
    code, third, _ = train(*prom_args(prom, store), "-f", str(policies), "--max-age", "7d")
    r = rows(third)
    assert {m for m, x in r.items() if x["result"] == "trained"} == {"shop/api/app", "shop/db/db"}
    assert r["shop/api/app"]["detail"].startswith("stale (trained 1w1d")  # Prometheus duration units: 1w = 7d
    assert r["shop/db/db"]["detail"].startswith("unreadable")
    after = {k: ModelStore(store).load(k).content_hash for k in GOOD}
    assert {k for k in GOOD if after[k] != hashes[k]} == {"shop/api/app", "shop/db/db"}
    # --max-age 0: everything named is retrained
    code, fourth, _ = train(*prom_args(prom, store), "-f", str(policies), "--max-age", "0")
    assert {m for m, x in rows(fourth).items() if x["result"] == "trained"} == GOOD


@pytest.mark.prometheus
def test_shards_split_the_models_disjointly_and_completely(prom, tmp_path):
    policies = write_policies(tmp_path / "policies.yaml")
    seen: dict[str, int] = {}
    for i in range(3):
        store = tmp_path / f"shard-{i}"
        # shard 1 reads its index the way an Indexed Job's pod does
        shard = ["--shard", "auto/3"] if i == 1 else ["--shard", f"{i}/3"]
        env = {"JOB_COMPLETION_INDEX": "1"} if i == 1 else None
        code, doc, _ = train(*prom_args(prom, store), "-f", str(policies), *shard, env=env)
        assert doc["shard"] == {"index": i, "count": 3}
        for m in rows(doc):
            assert m not in seen, f"{m} in shards {seen[m]} and {i}"
            seen[m] = i
            assert shard_index(m, 3) == i
        assert set(ModelStore(store).keys()) == {m for m, r in rows(doc).items() if r["result"] == "trained"}
        # the refused container is reported by exactly one shard: the one of its model key
        assert len(doc["problems"]) == (1 if shard_index(f"{OTHER_NS}/api/app", 3) == i else 0)
        assert code == (1 if doc["problems"] or doc["counts"]["failed"] else 0)
    assert set(seen) == GOOD | {GHOST}


def test_plan_shards_many_keys_disjointly_and_completely(tmp_path):
    """The split itself, on 300 generated keys: each key in exactly one of N shards, for several N."""
    docs = [{"apiVersion": "ratefit.dev/v1alpha1", "kind": "SizingPolicy",
             "metadata": {"name": f"w{i}", "namespace": f"ns{i % 7}"},
             "spec": {"workload": {"kind": "Deployment", "name": f"w{i}"},
                      "containers": [{"name": "app", "model": f"ns{i % 7}/w{i}/app"}]}} for i in range(300)]
    sources = [PolicySource("test", d) for d in docs]
    every = {t.model for t in plan_training(sources, store_dir=tmp_path, max_age_s=1, now=time.time()).tasks}
    assert len(every) == 300
    for n in (1, 2, 4, 7):
        parts = [{t.model for t in plan_training(sources, store_dir=tmp_path, max_age_s=1, now=time.time(),
                                                 shard=(i, n)).tasks} for i in range(n)]
        assert sum(len(p) for p in parts) == 300 and set().union(*parts) == every
        if n > 1:
            assert all(parts), "every shard gets some keys (300 keys, CRC-32)"


def test_shard_flag_and_files():
    assert parse_shard("2/4", {}) == (2, 4)
    assert parse_shard("auto/4", {"JOB_COMPLETION_INDEX": "3"}) == (3, 4)
    assert parse_shard(None) is None
    for bad, env in (("4/4", {}), ("x/2", {}), ("1", {}), ("0/0", {}), ("auto/4", {})):
        with pytest.raises(InputError):
            parse_shard(bad, env)
    with pytest.raises(InputError, match="JOB_COMPLETION_INDEX"):
        parse_shard("auto/2", {})
    # CRC-32 (IEEE 802.3) check value of "123456789" is 0xCBF43926 (the CRC catalogue)
    assert shard_index("123456789", 2**32) == 0xCBF43926


def test_policy_files_skip_other_kinds_and_lists(tmp_path):
    d = tmp_path / "dir"
    (d / "sub").mkdir(parents=True)
    write_policies(d / "a.yaml")
    (d / "sub" / "list.json").write_text(json.dumps({"apiVersion": "v1", "kind": "List", "items": policy_docs()[:2]}))
    (d / "kustomization.yaml").write_text("resources: [a.yaml]\n")
    (d / "notes.txt").write_text("not read")
    got = read_policy_files([d])
    assert len(got) == len(policy_docs()) + 2
    (tmp_path / "bad.yaml").write_text("a: [unclosed\n")
    with pytest.raises(InputError, match="bad.yaml"):
        read_policy_files([tmp_path / "bad.yaml"])
    with pytest.raises(InputError, match="no such file"):
        read_policy_files([tmp_path / "missing"])


def test_invalid_policy_and_duplicate_model_are_listed_not_fatal(tmp_path):
    docs = policy_docs()
    docs[0]["spec"]["containers"][0]["floor"] = "lots"  # invalid quantity
    twin = json.loads(json.dumps(docs[1]))
    twin["metadata"]["name"] = "api-v2-twin"
    twin["spec"]["workload"]["name"] = "api-v3"  # the same model key, other pods
    plan = plan_training([PolicySource("t", d) for d in [*docs, twin]], store_dir=tmp_path, max_age_s=1,
                         now=time.time())
    models = sorted(t.model for t in plan.tasks)
    assert models == sorted((GOOD | {GHOST}) - {"shop/api/app"})  # each once; the invalid policy's not
    msgs = {p.policy: p.message for p in plan.problems}
    # each problem in exactly one of 3 shards (invalid policy: by its own key; refused container: by its model)
    per_shard = [plan_training([PolicySource("t", d) for d in [*docs, twin]], store_dir=tmp_path, max_age_s=1,
                               now=time.time(), shard=(i, 3)).problems for i in range(3)]
    assert sorted(p.message for ps in per_shard for p in ps) == sorted(p.message for p in plan.problems)
    assert "spec.containers[0].floor" in msgs["shop/api"]
    assert "other queries" in msgs["shop/api-v2-twin"]
    assert f'namespace="{NS}"' in msgs[f"{OTHER_NS}/sneaky"]


@pytest.mark.parametrize("args, message", [
    (["--store", "s"], "exactly one of --prometheus URL or --samples-dir"),
    (["--store", "s", "--prometheus", "http://127.0.0.1:9", "--shard", "5/2"], "--shard"),
    (["--store", "s", "--prometheus", "http://127.0.0.1:9", "--jobs", "0"], "--jobs"),
    (["--store", "s", "--prometheus", "http://127.0.0.1:9", "--max-age", "seven"], "--max-age"),
    (["--store", "s", "--prometheus", "http://127.0.0.1:9", "--estimators", "crystal-ball"], "crystal-ball"),
    (["--store", "s", "--prometheus", "http://127.0.0.1:9", "--key", "a/b/c"], "--key"),
])
def test_bad_input_is_one_line_and_exit_2(args, message, tmp_path):
    proc = subprocess.run([str(RATEFIT), "train", "--from-policies", "-f", str(tmp_path), *args],
                          capture_output=True, text=True, cwd=tmp_path, timeout=120)
    assert proc.returncode == 2, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and message in lines[0] and lines[0].startswith("ratefit train: error:")


def test_from_policies_flags_are_refused_without_it(tmp_path):
    proc = subprocess.run([str(RATEFIT), "train", "--samples-dir", str(tmp_path), "--store", str(tmp_path / "s"),
                           "--shard", "0/2"], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 2 and "only go with --from-policies" in proc.stderr
