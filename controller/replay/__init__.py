"""What-if replay: what the SizingPolicies would have done over a stored history, what it
would have cost, how often pods would have been short of CPU and how many nodes it needs.

Modules, in the order a replay uses them:

* ``history`` — read per-pod request and CPU counters (OpenMetrics file or Prometheus);
* ``series`` — rates at simulated times (no look-ahead) and usage per pod and minute;
* ``inputs`` — the policies with their workloads (manifests or a cluster, read only) and
  the sizing answers (a model store or the sizing API);
* ``simulate`` — pass by pass, the live loop's own decision (``controller.decide``) with
  its settle/cooldown/budget state carried between passes;
* ``packing`` — nodes needed: first-fit decreasing;
* ``replicas`` — the replicas a CPU-utilisation autoscaler would run and the CPU they
  reserve, per strategy and for the suggested (coupled) size;
* ``outcome`` — cpu-hours, under-share, changes, peak nodes; table, Markdown, JSON;
* ``plots`` — requested CPU over time against usage, nodes over time, request steps;
* ``engine`` — :func:`run_replay`, the whole replay from its parts.
"""

from ratefit.controller.replay.engine import ReplayOptions, ReplayResult, pass_times, run_replay
from ratefit.controller.replay.history import History, read_openmetrics, read_prometheus
from ratefit.controller.replay.inputs import ApiSizer, StoreSizer, Targets, read_manifests, targets_from_cluster, targets_from_objects
from ratefit.controller.replay.outcome import Outcome, render, to_json
from ratefit.controller.replay.simulate import BudgetConfig

__all__ = [
    "ReplayOptions", "ReplayResult", "run_replay", "pass_times",
    "History", "read_openmetrics", "read_prometheus",
    "ApiSizer", "StoreSizer", "Targets", "read_manifests", "targets_from_cluster", "targets_from_objects",
    "Outcome", "render", "to_json", "BudgetConfig",
]
