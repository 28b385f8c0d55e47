"""Profiling a black-box HTTP service: open-loop load in steps, CPU per step, the knee.

``ratefit profile`` (controller/commands/profile.py) drives these modules:

- ``loadgen``   — the open-loop asyncio HTTP/1.1 client (no coordinated omission);
- ``cpu_probe`` — CPU of the target from /proc, a cgroup, or Prometheus;
- ``steps``     — the step runner, the pass/fail judgement and the capacity (knee);
- ``fit``       — the least-squares line cores = intercept + slope × rate and its R²;
- ``output``    — samples CSV (training format), JSON, step table, plot.
"""

from ratefit.controller.profile.fit import LinearFit, linear_fit
from ratefit.controller.profile.steps import Criteria, Profile, StepPlan, StepResult, find_capacity, plan_rates

__all__ = [
    "LinearFit",
    "linear_fit",
    "Criteria",
    "Profile",
    "StepPlan",
    "StepResult",
    "find_capacity",
    "plan_rates",
]
