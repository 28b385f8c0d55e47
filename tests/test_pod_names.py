"""Pod name → workload: the anchored regexes of controller/pod_names against names built the
way Kubernetes builds them, including names with dashes and digits that could fool a pattern.

References (Kubernetes source, from memory, cross-checked against copies of the code):
* k8s.io/apimachinery pkg/util/rand: ``alphanums = "bcdfghjklmnpqrstvwxz2456789"``;
  ``String(n)`` draws n of them; ``SafeEncodeString(s)`` maps each rune r of s to
  ``alphanums[int(r) % len(alphanums)]``.
* kubernetes pkg/controller ``ComputeHash``: FNV-32a of the pod template (plus a collision
  count), printed in decimal, then ``SafeEncodeString`` → the ``pod-template-hash``; the
  Deployment controller names the ReplicaSet ``<deployment>-<hash>``.
* k8s.io/apiserver pkg/storage/names ``SimpleNameGenerator``: ``generateName`` longer than
  ``maxGeneratedNameLength = 63 - 5`` is cut to 58 characters, then 5 random characters
  are appended; the ReplicaSet's pods use ``generateName: <replicaset>-``.
* StatefulSet pods are ``<statefulset>-<ordinal>`` (Kubernetes docs, "StatefulSets: Pod Identity").
"""

from __future__ import annotations

import random
import re
import string

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from ratefit.controller.pod_names import NAME_ALPHABET, PodAssigner, WorkloadRef, pod_name_regex


def safe_encode(s: str) -> str:
    return "".join(NAME_ALPHABET[ord(c) % len(NAME_ALPHABET)] for c in s)


def template_hash(seed: int) -> str:
    """A pod-template-hash as Kubernetes makes one: FNV-32a → decimal → SafeEncodeString."""
    h = 0x811C9DC5
    for b in seed.to_bytes(8, "little"):
        h = ((h ^ b) * 0x01000193) & 0xFFFFFFFF
    return safe_encode(str(h))


def generate_name(base: str, rng: random.Random) -> str:
    """SimpleNameGenerator.GenerateName."""
    return base[:58] + "".join(rng.choice(NAME_ALPHABET) for _ in range(5))


def deployment_pod(name: str, rng: random.Random, seed: int | None = None) -> str:
    rs = f"{name}-{template_hash(rng.randrange(1 << 32) if seed is None else seed)}"
    return generate_name(rs + "-", rng)


def matches(kind: str | None, name: str, pod: str) -> bool:
    return re.match(pod_name_regex(kind, name), pod) is not None


def test_the_reference_helpers_make_the_names_seen_on_clusters():
    # digits '0'..'9' are runes 48..57 → alphanums[21..26], alphanums[0..3]
    assert safe_encode("0123456789") == "456789bcdf"
    h = template_hash(7)
    assert 1 <= len(h) <= 10 and set(h) <= set(NAME_ALPHABET)
    assert not set(NAME_ALPHABET) & set("aeiou013")  # no vowels, no 0, 1, 3


@pytest.mark.parametrize(("kind", "name", "pod", "expected"), [
    # a Deployment's pods: name, hash, 5 random characters
    ("Deployment", "api-v2", "api-v2-7d9f8b6c5d-x2k9p", True),
    ("Deployment", "api", "api-v2-7d9f8b6c5d-x2k9p", False),  # one dash-part too many for "api"
    ("Deployment", "api", "api-7d9f8b6c5d-x2k9p", True),
    ("Deployment", "web-12345", "web-12345-6b7c8d9f5-kq2zx", True),
    ("Deployment", "web", "web-12345-6b7c8d9f5-kq2zx", False),
    ("Deployment", "web", "web-6b7c8d9f5-kq2zx", True),
    ("Deployment", "web", "web-6b7c8d9f5-kq2zxx", False),  # suffix is exactly 5
    ("Deployment", "web", "web-6b7c8d9f5-KQ2ZX", False),  # names are lower case
    ("Deployment", "web", "web-6b7c8d9f5-kq1zx", False),  # '1' is never drawn
    ("Deployment", "web", "web-abcdefghijk-kq2zx", False),  # hash of 11 characters: no uint32 has 11 digits
    ("Deployment", "web", "web-0", False),
    ("Deployment", "web", "xweb-6b7c8d9f5-kq2zx", False),  # anchored at the start
    ("Deployment", "a.b", "axb-6b7c8d9f5-kq2zx", False),  # the dot is literal
    ("Deployment", "a.b", "a.b-6b7c8d9f5-kq2zx", True),
    # a StatefulSet's pods: name and ordinal
    ("StatefulSet", "db", "db-0", True),
    ("StatefulSet", "db", "db-12", True),
    ("StatefulSet", "db", "db-1-0", False),  # a pod of the StatefulSet "db-1"
    ("StatefulSet", "db-1", "db-1-0", True),
    ("StatefulSet", "db-1", "db-1", False),
    ("StatefulSet", "db", "db-01", False),  # ordinals have no leading zero
    ("StatefulSet", "db", "db-x", False),
    ("StatefulSet", "db", "db-6b7c8d9f5-kq2zx", False),
    # kind unknown: either pattern
    (None, "db", "db-0", True),
    (None, "db", "db-6b7c8d9f5-kq2zx", True),
    (None, "db", "db-1-0", False),
])
def test_tricky_names(kind, name, pod, expected):
    assert matches(kind, name, pod) is expected


def test_assigner_gives_each_pod_to_its_own_workload():
    ns = "shop"
    workloads = [WorkloadRef(ns, "Deployment", n) for n in ("api", "api-v2", "web", "web-12345")] + [
        WorkloadRef(ns, "StatefulSet", n) for n in ("db", "db-1")]
    a = PodAssigner(workloads)
    expect = {
        "api-7d9f8b6c5d-x2k9p": "api",
        "api-v2-7d9f8b6c5d-x2k9p": "api-v2",
        "web-6b7c8d9f5-kq2zx": "web",
        "web-12345-6b7c8d9f5-kq2zx": "web-12345",
        "db-0": "db",
        "db-1": "db",
        "db-1-0": "db-1",
        "db-1-7": "db-1",
        "cache-0": None,
        "api": None,
    }
    for pod, want in expect.items():
        got = a.workload_of(ns, pod)
        assert (got.name if got else None) == want, pod
    assert a.workload_of("other", "api-7d9f8b6c5d-x2k9p") is None  # namespaces stay apart
    split = a.split(ns, {p: 1.0 for p in expect})
    assert split[WorkloadRef(ns, "StatefulSet", "db-1")] == {"db-1-0": 1.0, "db-1-7": 1.0}


def test_contrived_overlap_goes_to_the_longer_name():
    """Deployment "a" and StatefulSet "a-bc" with ordinal 24567: both patterns match
    "a-bc-24567" (bc is a possible hash, 24567 a possible suffix); the longer name wins."""
    a = PodAssigner([WorkloadRef("n", "Deployment", "a"), WorkloadRef("n", "StatefulSet", "a-bc")])
    assert matches("Deployment", "a", "a-bc-24567") and matches("StatefulSet", "a-bc", "a-bc-24567")
    assert a.workload_of("n", "a-bc-24567").name == "a-bc"


def test_long_deployment_names_are_cut_like_generate_name():
    rng = random.Random(3)
    for length in range(40, 70):
        name = ("svc-" + "x" * 80)[:length].rstrip("-")
        for _ in range(20):
            pod = deployment_pod(name, rng)
            assert len(pod) <= 63
            assert matches("Deployment", name, pod), (name, pod)
    # at 57 characters nothing of the hash survives: the name, its dash, 5 random characters
    name = "n" * 57
    pod = deployment_pod(name, rng)
    assert pod.startswith(name + "-") and len(pod) == 63 and matches("Deployment", name, pod)


dns_label = st.from_regex(r"\A[a-z0-9]([a-z0-9-]{0,30}[a-z0-9])?\Z")


@settings(max_examples=300, deadline=None)
@given(name=dns_label, other=dns_label, seed=st.integers(0, 2**32 - 1), ordinal=st.integers(0, 500))
def test_generated_pods_match_their_workload_and_go_to_it(name, other, seed, ordinal):
    rng = random.Random(seed)
    dpod = deployment_pod(name, rng, seed=seed)
    spod = f"{name}-{ordinal}"
    assert matches("Deployment", name, dpod)
    assert matches("StatefulSet", name, spod)
    a = PodAssigner([WorkloadRef("n", "Deployment", name), WorkloadRef("n", "Deployment", f"{name}-{other}"),
                     WorkloadRef("n", "StatefulSet", f"{name}-{other}")])
    assert a.workload_of("n", dpod) == WorkloadRef("n", "Deployment", name)
    # a workload whose name extends this one never takes this one's pods
    assert not matches("Deployment", f"{name}-{other}", dpod)
    assert not matches("StatefulSet", f"{name}-{other}", spod)


def test_regexes_have_the_syntax_re2_and_python_share():
    rx = pod_name_regex("Deployment", "a.b-c")
    for forbidden in ("(?P", "(?<", "\\d", "\\-"):
        assert forbidden not in rx
    assert set(string.ascii_uppercase) & set(rx.replace("Deployment", "")) == set()


@settings(max_examples=200, deadline=None)
@given(names=st.lists(st.tuples(st.sampled_from(["Deployment", "StatefulSet", None]),
                                st.one_of(dns_label, st.from_regex(r"\Asvc-[a-z]{45,60}\Z"))), min_size=1, max_size=6),
       seed=st.integers(0, 2**32 - 1))
def test_the_factored_regex_and_the_assigner_equal_the_per_workload_regexes(names, seed):
    """pods_regex (sent to Prometheus) matches exactly the pods some workload's own regex
    matches, and PodAssigner's shortcut picks what trying every regex would pick."""
    from ratefit.controller.pod_names import pods_regex

    rng = random.Random(seed)
    refs = [WorkloadRef("n", k, n) for k, n in names]
    pods = set()
    for _, n in names:
        pods |= {deployment_pod(n, rng), f"{n}-{rng.randrange(100)}", f"{n}-x", f"{n}-{rng.randrange(100)}-0"}
        pods.add(deployment_pod(n + "-" + rng.choice(["v2", "1", "api"]), rng))
    big = re.compile(pods_regex(refs))
    a = PodAssigner(refs)
    for pod in pods:
        own = [w for w in refs if re.match(w.regex, pod)]
        assert (big.match(pod) is not None) == bool(own), pod
        got = a.workload_of("n", pod)
        if not own:
            assert got is None, pod
        else:
            longest = max(len(w.name) for w in own)
            assert got in own and len(got.name) == longest, pod
