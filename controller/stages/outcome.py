"""What a pass came to: :class:`PassOutcome` (one value per pass) and :class:`PassResult`
(the one outcome type of a pass — read by the loop, the commands and the orchestrator's
metrics and pass log line)."""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field
from enum import StrEnum

from ratefit.controller.review import ReviewRow

__all__ = ["PassOutcome", "PassResult"]


class PassOutcome(StrEnum):
    """What one pass came to (one value per pass; the loop and the metric read it)."""

    DONE = "done"  # every policy decided and acted on
    DEGRADED = "degraded"  # done, but some inputs or writes failed (held, retried next pass)
    ABANDONED = "abandoned"  # stopped early (SIGTERM or lost the Lease); the rest is left as it was
    FAILED = "failed"  # could not even list the policies; nothing was done


@dataclass(frozen=True)
class PassResult:
    """The one outcome type of a pass."""

    outcome: PassOutcome
    rows: tuple[ReviewRow, ...] = ()
    policies: int = 0
    invalid: int = 0
    #: workload keys (namespace/Kind/name) changed in the cluster this pass
    patched: tuple[str, ...] = ()
    status_writes: int = 0
    events: int = 0
    errors: tuple[str, ...] = ()
    duration_s: float = 0.0
    #: seconds until the loop should run again (None: its interval)
    requeue_after: float | None = None
    #: wall time spent in each phase (seconds): gather, decide, act
    phases: Mapping[str, float] = field(default_factory=dict)
