"""The replay step of ``ratefit demo``: what the demo's policies would have done over the
INVENTED Kestrel Post history (every policy as if in apply mode).

Called by ``controller/demo.py`` with what the demo already has: the OpenMetrics history,
the model store it trained, the folders with the scenario's workloads and the example
policies, and the real Prometheus when one runs (a policy with its own ``rateQuery`` is
then evaluated there; without it, that policy has no rates and the summary says so).
Writes the report (plots, summary.md, replay.json) into ``out`` and returns the summary
table as text.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from pathlib import Path

__all__ = ["replay_demo"]


def replay_demo(*, history: Path, store: Path, manifests: Sequence[Path], out: Path, request_metric: str,
                prometheus_url: str | None = None, progress: Callable[[str], None] = lambda _m: None) -> str:
    from ratefit.controller.metrics_source import RateRequest
    from ratefit.controller.replay.engine import ReplayOptions, pass_times, run_replay
    from ratefit.controller.replay.history import custom_rates, read_openmetrics
    from ratefit.controller.replay.inputs import StoreSizer, read_manifests, targets_from_objects
    from ratefit.controller.replay.outcome import render
    from ratefit.controller.replay.plots import write_report
    from ratefit.models.durations import format_duration

    targets = targets_from_objects(read_manifests(list(manifests)))
    hist = read_openmetrics(history, request_metric=request_metric)
    options = ReplayOptions()
    custom = None
    wanted = [((t.policy.key, c.name), RateRequest(
        namespace=t.policy.namespace, policy=t.policy.name, workload=t.policy.workload_name, container=c.name,
        query=c.rate_query, rate_window=format_duration(t.policy.rate_window_s), percentile=t.policy.rate_percentile))
        for t in targets.targets for c in t.policy.containers if c.rate_query is not None]
    if wanted and prometheus_url:
        from ratefit.models.prometheus import PrometheusClient

        with PrometheusClient(prometheus_url, timeout=60.0) as prom:
            custom = custom_rates(prom, wanted, pass_times(hist.start, hist.end, options.step_s), rate_step="30s")
    result = run_replay(hist, targets, StoreSizer(store), start=hist.start, end=hist.end, options=options,
                        custom_rates=custom, progress=progress)
    write_report(result, out)
    return render(result.outcome, "table")
