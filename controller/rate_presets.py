"""Presets for the common request-counter conventions: which counter, which labels.

``ratefit run|plan|check --rate-preset NAME`` (or the ConfigMap key ``RATEFIT_RATE_PRESET``,
which the Deployment passes as that environment variable) picks the default rate template
(``metrics_source.RateTemplate``) for every policy without its own ``rateQuery``.
``--rate-metric`` still replaces the preset's counter name (e.g. an application whose
counter is ``orders_http_requests_total``), and ``--rate-range`` the range of its rate().

Every preset maps pods to workloads by the pods' names (``controller/pod_names``), so the
counter needs only a namespace label and a pod label — the labels a pod or service
monitor, or annotation-based scraping, attaches to every series it scrapes.

The table (the exact per-workload PromQL for a Deployment ``api`` in namespace ``shop``;
``RX`` = ``^api-[bcdfghjklmnpqrstvwxz2456789]{1,10}-[bcdfghjklmnpqrstvwxz2456789]{5}$``) is
:func:`preset_table`, printed by ``--help`` and kept in README.md; a test checks the README
against it.

Facts behind the presets (from memory; say so where they matter):

* ``http-requests-total``: the Prometheus client libraries' conventional counter name for
  HTTP requests served (``http_requests_total``; Prometheus docs "Metric and label naming").
* ``otel-http-server``: OpenTelemetry's semantic conventions name the server duration
  histogram ``http.server.request.duration`` in seconds; its Prometheus form has the count
  series ``http_server_request_duration_seconds_count``, a counter of requests.
* ``istio-requests-total``: a service mesh sidecar's per-workload request counter
  ``istio_requests_total``, reported by both ends of a call; ``reporter="destination"``
  keeps the receiving side, scraped from the receiving pod (so its ``pod`` label is that pod).
* ``annotation-pods``: pods scraped because of ``prometheus.io/scrape`` annotations by the
  older example configurations, which relabel ``__meta_kubernetes_namespace`` to
  ``kubernetes_namespace`` and ``__meta_kubernetes_pod_name`` to ``kubernetes_pod_name``
  (newer ones write ``namespace`` and ``pod``: use ``http-requests-total`` then).
* ``workload-label``: a counter that already carries a ``workload`` label (the INVENTED demo
  scenario's counter does); matched by that label instead of pod names.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, replace

from ratefit.controller.rate_template import RateTemplate
from ratefit.models.errors import InputError

__all__ = ["RatePreset", "PRESETS", "DEFAULT_PRESET", "PRESET_ENV", "preset", "template_for", "preset_table"]

PRESET_ENV = "RATEFIT_RATE_PRESET"
DEFAULT_PRESET = "http-requests-total"


@dataclass(frozen=True, slots=True)
class RatePreset:
    name: str
    summary: str
    template: RateTemplate


PRESETS: dict[str, RatePreset] = {
    p.name: p
    for p in (
        RatePreset("http-requests-total",
                   "an application's own http_requests_total counter, scraped with namespace and pod labels",
                   RateTemplate(metric="http_requests_total")),
        RatePreset("otel-http-server",
                   "OpenTelemetry's HTTP server duration histogram (its _count series), namespace and pod labels",
                   RateTemplate(metric="http_server_request_duration_seconds_count")),
        RatePreset("istio-requests-total",
                   "a mesh sidecar's per-workload request counter, counted at the receiving pod",
                   RateTemplate(metric="istio_requests_total", matchers=(("reporter", "destination"),))),
        RatePreset("annotation-pods",
                   "pods scraped by prometheus.io/scrape annotations with the older kubernetes_namespace and "
                   "kubernetes_pod_name labels",
                   RateTemplate(metric="http_requests_total", namespace_label="kubernetes_namespace",
                                pod_label="kubernetes_pod_name")),
        RatePreset("workload-label",
                   "a counter that carries its own workload label besides namespace and pod",
                   RateTemplate(metric="http_requests_total", workload_label="workload")),
    )
}


def preset(name: str) -> RatePreset:
    """The preset called ``name``; InputError listing the known names otherwise."""
    try:
        return PRESETS[name]
    except KeyError:
        raise InputError(f"--rate-preset {name!r} is not a preset; use one of: {', '.join(PRESETS)}") from None


def template_for(name: str | None = None, *, metric: str | None = None, interval: str | None = None) -> RateTemplate:
    """The rate template of preset ``name`` (default: ``$RATEFIT_RATE_PRESET``, else
    ``http-requests-total``), with ``metric``/``interval`` replaced when given."""
    chosen = preset(name or os.environ.get(PRESET_ENV) or DEFAULT_PRESET).template
    changes = {k: v for k, v in (("metric", metric), ("interval", interval)) if v}
    return replace(chosen, **changes) if changes else chosen


def preset_table(*, namespace: str = "shop", kind: str = "Deployment", workload: str = "api",
                 markdown: bool = False) -> str:
    """Every preset with the exact per-workload query it produces (for ``--help`` and README)."""
    rows = [(p.name, p.summary, p.template.for_workload(namespace, kind, workload)) for p in PRESETS.values()]
    if markdown:
        out = ["| preset | counter convention | PromQL for Deployment `api` in `shop` |", "|---|---|---|"]
        out += [f"| `{n}` | {s} | `{q.replace('|', chr(92) + '|')}` |" for n, s, q in rows]
        return "\n".join(out) + "\n"
    return "".join(f"  {n}: {s}\n      {q}\n" for n, s, q in rows)
