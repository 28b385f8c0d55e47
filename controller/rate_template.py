"""The default per-pod request-rate expression (:class:`RateTemplate`): which counter, which
labels, and the PromQL built from them — for a set of workloads (the grouped query of a pass,
``controller/metrics_source``) or one workload (training, ``ratefit check``).

Kept apart from the rate source (no numpy, no HTTP) so the command line can list the presets
(``controller/rate_presets``) in ``--help`` without loading either.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass

from ratefit.controller.pod_names import WorkloadRef, pod_name_regex, pods_regex, promql_string
from ratefit.models.durations import parse_duration
from ratefit.models.errors import InputError

__all__ = ["RateTemplate"]

_MATCHER_LABEL = re.compile(r"^[a-zA-Z_][a-zA-Z0-9_]*$")


@dataclass(frozen=True, slots=True)
class RateTemplate:
    """The default per-pod request-rate expression: ``rate(metric{…}[interval])`` summed by
    the namespace and pod labels of the request counter.

    ``matchers``: fixed equality matchers ``(label, value)`` every series must have (e.g.
    ``("reporter", "destination")``). ``workload_label``: None (the default) maps pods to
    workloads by name; a label name instead trusts that label on the counter.
    """

    metric: str = "http_requests_total"
    namespace_label: str = "namespace"
    workload_label: str | None = None
    pod_label: str = "pod"
    interval: str = "2m"
    matchers: tuple[tuple[str, str], ...] = ()

    def __post_init__(self) -> None:
        if not re.match(r"^[a-zA-Z_:][a-zA-Z0-9_:]*$", self.metric or ""):
            raise InputError(f"rate metric {self.metric!r} is not a Prometheus metric name "
                             "(letters, digits, _ and :), e.g. http_requests_total")
        for lab in (self.namespace_label, self.pod_label, self.workload_label, *(k for k, _ in self.matchers)):
            if lab is not None and not _MATCHER_LABEL.match(lab):
                raise InputError(f"rate template label {lab!r} is not a Prometheus label name")
        parse_duration(self.interval, field="rate interval")

    def _fixed(self) -> str:
        return "".join(f',{k}="{promql_string(v)}"' for k, v in self.matchers)

    def inner(self, namespaces: Sequence[str], workloads: Sequence[WorkloadRef] = ()) -> str:
        """``sum by (…) (rate(M{…}[R]))`` for these namespaces (and, mapping by pod name,
        restricted to the pods of ``workloads``)."""
        alts = "|".join(_regex_literal(ns) for ns in sorted(set(namespaces)))
        sel = f'{self.namespace_label}=~"{alts}"'
        if self.workload_label:
            by = f"{self.namespace_label}, {self.workload_label}, {self.pod_label}"
        else:
            by = f"{self.namespace_label}, {self.pod_label}"
            rx = pods_regex(workloads)
            if rx:
                sel += f',{self.pod_label}=~"{promql_string(rx)}"'
        return f"sum by ({by}) (rate({self.metric}{{{sel}{self._fixed()}}}[{self.interval}]))"

    def for_workload(self, namespace: str, kind: str | None, name: str) -> str:
        """The per-pod request rate (req/s) of ONE workload's pods, one series per pod
        labelled namespace and pod: the query training and ``ratefit check`` use.

        >>> RateTemplate().for_workload("shop", "StatefulSet", "db-1")
        'sum by (namespace, pod) (rate(http_requests_total{namespace="shop",pod=~"^db-1-(0|[1-9][0-9]*)$"}[2m]))'
        """
        if self.workload_label:
            sel = f'{self.namespace_label}="{promql_string(namespace)}",{self.workload_label}="{promql_string(name)}"'
        else:
            sel = (f'{self.namespace_label}="{promql_string(namespace)}",'
                   f'{self.pod_label}=~"{promql_string(pod_name_regex(kind, name))}"')
        return (f"sum by ({self.namespace_label}, {self.pod_label}) "
                f"(rate({self.metric}{{{sel}{self._fixed()}}}[{self.interval}]))")


_RE2_META = re.compile(r"([.^$*+?()\[\]{}|\\])")


def _regex_literal(text: str) -> str:
    """``text`` as a literal inside a PromQL ``=~"…"`` matcher: RE2 metacharacters escaped,
    then backslashes and quotes escaped for the PromQL string. (Python's ``re.escape`` also
    escapes ``-``, and ``"\\-"`` is not a valid PromQL string escape: Prometheus refuses it.)"""
    rx = _RE2_META.sub(r"\\\1", text)
    return rx.replace("\\", "\\\\").replace('"', '\\"')
