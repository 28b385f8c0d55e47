"""Compatibility: the reconcile pass now lives in ``controller/stages/`` (one module per
stage; see that package's docstring). The public names stay importable from here."""

from __future__ import annotations

from ratefit.controller.stages.crash import CRASH_POINTS, crash_hook_from_env
from ratefit.controller.stages.decide import LAST_CHANGE_ANNOTATION
from ratefit.controller.stages.observe import policy_object_dict, shard_of
from ratefit.controller.stages.orchestrator import PassOutcome, PassResult, ReconcileConfig, Reconciler

__all__ = [
    "CRASH_POINTS",
    "LAST_CHANGE_ANNOTATION",
    "PassOutcome",
    "PassResult",
    "ReconcileConfig",
    "Reconciler",
    "crash_hook_from_env",
    "policy_object_dict",
    "shard_of",
]
