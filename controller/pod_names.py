"""Which workload a pod belongs to, from the pod's name alone: one anchored regex per workload.

Request counters carry ``namespace`` and ``pod`` labels (set by the scrape's relabelling),
not a ``workload`` label. The controller maps pods to workloads itself, and it does so from
the pod NAME, with a precise regex built from the workload's kind and name.

Why the name (the choice, and the alternatives weighed):

* **Pod names (chosen).** Needs nothing but the counter: no extra exporter, no extra RBAC,
  no extra API call per pass. It also maps pods that are GONE: the rate window (default 1h)
  spans rollouts, and the series of a pod deleted 40 minutes ago still count — a lookup of
  live objects cannot map them, a name pattern can. The patterns are the ones Kubernetes
  itself uses to name pods, so they are exact except in contrived cases (below).
* The pods' ownerReferences: exact for live pods, but costs a LIST of pods (and of
  ReplicaSets, to go from ReplicaSet to Deployment) every pass, more RBAC, and cannot map
  pods that no longer exist (see above).
* kube-state-metrics' ``kube_pod_owner`` (joined with ``kube_replicaset_owner``): exact and
  historical, but only where kube-state-metrics is installed, and the owner of a
  Deployment's pod is its ReplicaSet, so the join is two levels deep in every query.

The patterns (Kubernetes source facts, from memory, checked against copies of the code):

* Deployment ``NAME``: its ReplicaSet is ``NAME-<pod-template-hash>`` and the ReplicaSet's
  pods are created with ``generateName: NAME-<hash>-``. The hash is
  ``rand.SafeEncodeString(fmt.Sprint(fnv32a))`` — the decimal digits of a uint32 (1 to 10 of
  them) each mapped into the alphabet ``bcdfghjklmnpqrstvwxz2456789`` (k8s.io/apimachinery
  ``pkg/util/rand``: no vowels, no 0, 1, 3). ``generateName`` appends ``rand.String(5)``
  from the same alphabet after cutting the prefix to 58 characters
  (k8s.io/apiserver ``pkg/storage/names``: ``maxGeneratedNameLength = 63 - 5``). (As the
  hash encodes decimal digits, real hashes use only ``456789bcdf``; the regex allows the
  whole alphabet, a margin should a release change the encoding.) So::

      ^NAME-[bcdfghjklmnpqrstvwxz2456789]{1,10}-[bcdfghjklmnpqrstvwxz2456789]{5}$

  and, when ``NAME-<hash>-`` is longer than 58 characters, the cut prefix followed by the
  5 random characters (the regex then allows the shorter hash that survived the cut).
* StatefulSet ``NAME``: pods are ``NAME-<ordinal>`` (decimal, no leading zeros; the
  ordinals start at ``spec.ordinals.start``, 0 by default)::

      ^NAME-(0|[1-9][0-9]*)$

Tricky names and why they do not fool these patterns: the Deployment ``api`` does not take
the pods of the Deployment ``api-v2`` (``api-v2-7d9f8b6c5d-x2k9p`` has one dash-part too
many), the StatefulSet ``db`` does not take the pods of the StatefulSet ``db-1``
(``db-1-0``: ``1-0`` is not an ordinal), and the Deployment ``web`` does not take the pods
of the Deployment ``web-12345``. Two patterns can still both match one pod name in
contrived cases (a Deployment ``a`` and a StatefulSet ``a-bc`` whose ordinal is 24567, the
five characters of a random suffix); :class:`PodAssigner` then gives the pod to the
workload with the LONGER name (its prefix is the more specific one). A bare pod or a Job's
pod named like a Deployment's pod is counted for that Deployment: name your pods apart or
give the policy its own ``rateQuery``.

Regexes are written in the syntax Python's ``re`` and Prometheus' RE2 share, so the same
text filters series in PromQL (``pod=~"…"``, which Prometheus anchors fully anyway) and
assigns them to workloads on the client.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass

__all__ = [
    "NAME_ALPHABET",
    "MAX_GENERATED_PREFIX",
    "WorkloadRef",
    "pod_name_regex",
    "promql_string",
    "PodAssigner",
    "pods_regex",
]

#: k8s.io/apimachinery pkg/util/rand: the alphabet of random suffixes and of pod-template hashes
NAME_ALPHABET = "bcdfghjklmnpqrstvwxz2456789"
#: k8s.io/apiserver pkg/storage/names: a generateName prefix is cut to 63 − 5 characters
MAX_GENERATED_PREFIX = 58
#: decimal digits of the largest uint32 (4294967295): the longest pod-template hash
MAX_HASH_LENGTH = 10

_CHAR = f"[{NAME_ALPHABET}]"
_RE2_META = re.compile(r"([.^$*+?()\[\]{}|\\])")
KINDS = ("Deployment", "StatefulSet")


def _literal(text: str) -> str:
    """``text`` as a literal inside a regex (RE2 and Python ``re`` alike); unlike
    ``re.escape`` it leaves ``-`` alone (``\\-`` is not valid everywhere)."""
    return _RE2_META.sub(r"\\\1", text)


def promql_string(regex: str) -> str:
    """A regex as the body of a PromQL double-quoted string: backslashes and quotes escaped."""
    return regex.replace("\\", "\\\\").replace('"', '\\"')


def pod_name_regex(kind: str | None, name: str) -> str:
    """The anchored regex of the names of ``kind`` ``name``'s pods (see the module docstring).

    >>> pod_name_regex("StatefulSet", "db-1")
    '^db-1-(0|[1-9][0-9]*)$'
    """
    if not name:
        raise ValueError("a workload name is required")
    if kind is None:  # kind unknown: the names of either kind
        return f"{pod_name_regex('Deployment', name)}|{pod_name_regex('StatefulSet', name)}"
    if kind == "StatefulSet":
        return f"^{_literal(name)}-(0|[1-9][0-9]*)$"
    if kind != "Deployment":
        raise ValueError(f"workload kind {kind!r} is not supported; use one of {', '.join(KINDS)}")
    room = MAX_GENERATED_PREFIX - len(name) - 1  # characters of the hash that survive the cut
    suffix = f"{_CHAR}{{5}}$"
    if room >= 1:
        # "NAME-" + hash + "-": a hash cut short loses the dash after it too
        longest = min(MAX_HASH_LENGTH, room)
        full = f"{_CHAR}{{1,{min(MAX_HASH_LENGTH, room - 1)}}}-" if room - 1 >= 1 else None
        cut = f"{_CHAR}{{{longest}}}" if room <= MAX_HASH_LENGTH else None
        alts = [a for a in (full, cut) if a]
        hash_part = alts[0] if len(alts) == 1 else "(" + "|".join(alts) + ")"
        return f"^{_literal(name)}-{hash_part}{suffix}"
    # the prefix is cut inside NAME or right after it: NAME[:58] (+ "-" if it fits) + 5 random
    prefix = (name + "-")[:MAX_GENERATED_PREFIX]
    return f"^{_literal(prefix)}{suffix}"


@dataclass(frozen=True, slots=True)
class WorkloadRef:
    """A workload whose pods are wanted: ``namespace``, ``kind`` (Deployment | StatefulSet), ``name``."""

    namespace: str
    kind: str | None  # None: either kind's pod names
    name: str

    @property
    def regex(self) -> str:
        return pod_name_regex(self.kind, self.name)


#: a Deployment whose name is at most this long never has its pods' hash cut (58 − 1 − 10 − 1)
SHORT_NAME = MAX_GENERATED_PREFIX - MAX_HASH_LENGTH - 2

_Match = Callable[[str], object]
#: what follows the name in a pod of a short-named Deployment, and of any StatefulSet
_DEPLOYMENT_TAIL = re.compile(f"-{_CHAR}{{1,{MAX_HASH_LENGTH}}}-{_CHAR}{{5}}")
_STATEFULSET_TAIL = re.compile("-(0|[1-9][0-9]*)")


def _matcher(w: WorkloadRef) -> _Match:
    """``pod -> truthy`` exactly when ``pod_name_regex(w.kind, w.name)`` matches, without
    compiling a regex per workload in the common cases (thousands of workloads per pass)."""
    name = w.name
    if w.kind is None:
        dep, sts = _matcher(WorkloadRef(w.namespace, "Deployment", name)), _matcher(WorkloadRef(w.namespace, "StatefulSet", name))
        return lambda pod: dep(pod) or sts(pod)
    if w.kind == "StatefulSet":
        return lambda pod: pod.startswith(name) and _STATEFULSET_TAIL.fullmatch(pod, len(name)) is not None
    if len(name) <= SHORT_NAME:
        return lambda pod: pod.startswith(name) and _DEPLOYMENT_TAIL.fullmatch(pod, len(name)) is not None
    return re.compile(w.regex).match


class PodAssigner:
    """Assigns pod names to workloads of one set, by :func:`pod_name_regex`.

    A pod matching several workloads of its namespace goes to the one with the longest
    name (the more specific prefix); ties (the same name as Deployment and StatefulSet)
    go to the kind that sorts first, and are counted in :attr:`ambiguous`.

    Cost per pod is constant, not proportional to the workloads: the candidate names are
    cut from the pod name (its last one or two dash-separated parts: the hash and suffix
    of a Deployment's pod, the ordinal of a StatefulSet's), looked up in a dict and
    confirmed by that workload's regex; only Deployments with names longer than
    :data:`SHORT_NAME` (whose pods' hash may be cut) are tried one by one.
    """

    def __init__(self, workloads: Iterable[WorkloadRef]) -> None:
        self._by_name: dict[tuple[str, str], list[tuple[WorkloadRef, _Match]]] = {}
        self._long: dict[str, list[tuple[WorkloadRef, _Match]]] = {}
        self._refs: set[WorkloadRef] = set()
        for w in workloads:
            if w in self._refs:
                continue
            self._refs.add(w)
            entry = (w, _matcher(w))
            self._by_name.setdefault((w.namespace, w.name), []).append(entry)
            if w.kind != "StatefulSet" and len(w.name) > SHORT_NAME:
                self._long.setdefault(w.namespace, []).append(entry)
        for entries in self._by_name.values():
            entries.sort(key=lambda e: e[0].kind or "")
        self.ambiguous = 0

    @property
    def workloads(self) -> tuple[WorkloadRef, ...]:
        return tuple(sorted(self._refs, key=lambda w: (w.namespace, w.name, w.kind or "")))

    def workload_of(self, namespace: str, pod: str) -> WorkloadRef | None:
        """The workload ``pod`` belongs to, or None when no workload of the set matches."""
        names = set()
        parts = pod.rsplit("-", 2)
        if len(parts) >= 2:
            names.add(parts[0] + "-" + parts[1] if len(parts) == 3 else parts[0])  # StatefulSet: cut the ordinal
        if len(parts) == 3:
            names.add(parts[0])  # Deployment: cut hash and suffix
        found: list[WorkloadRef] = []
        for name in names:
            for w, rx in self._by_name.get((namespace, name), ()):
                if rx(pod):
                    found.append(w)
        for w, rx in self._long.get(namespace, ()):
            if w not in found and rx(pod):
                found.append(w)
        if not found:
            return None
        found.sort(key=lambda w: (-len(w.name), w.kind or ""))
        if len(found) > 1 and len(found[1].name) == len(found[0].name):
            self.ambiguous += 1
        return found[0]

    def split(self, namespace: str, pods: Mapping[str, float]) -> dict[WorkloadRef, dict[str, float]]:
        """``{pod: value}`` of one namespace → ``{workload: {pod: value}}`` (unmatched pods dropped)."""
        out: dict[WorkloadRef, dict[str, float]] = {}
        for pod, v in pods.items():
            w = self.workload_of(namespace, pod)
            if w is not None:
                out.setdefault(w, {})[pod] = v
        return out


def pods_regex(workloads: Iterable[WorkloadRef]) -> str:
    """One regex for the pods of all ``workloads`` (any namespace), factored so that a
    regex engine matches it in time independent of the number of workloads: the names of
    short-named Deployments share one ``(?:a|b|…)-HASH-SUFFIX`` branch, those of
    StatefulSets one ``(?:a|b|…)-ORDINAL`` branch; long-named Deployments (whose hash may
    be cut) get their own :func:`pod_name_regex`. Equivalent to the alternation of every
    workload's own regex."""
    dep, sts, long_ = set(), set(), set()
    for w in workloads:
        if w.kind in (None, "StatefulSet"):
            sts.add(w.name)
        if w.kind in (None, "Deployment"):
            (dep if len(w.name) <= SHORT_NAME else long_).add(w.name)
    branches = []
    if dep:
        branches.append(f"^(?:{'|'.join(_literal(n) for n in sorted(dep))})-{_CHAR}{{1,{MAX_HASH_LENGTH}}}-{_CHAR}{{5}}$")
    if sts:
        branches.append(f"^(?:{'|'.join(_literal(n) for n in sorted(sts))})-(0|[1-9][0-9]*)$")
    branches += [pod_name_regex("Deployment", n) for n in sorted(long_)]
    return "|".join(branches)
