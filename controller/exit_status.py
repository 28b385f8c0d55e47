"""Exit status of a single pass (``ratefit plan``, ``ratefit run --once``) for scripts.

A pass that could not reach one of its inputs still prints a review (every container
held NoMetrics, NoModel or ApiUnavailable); scripts must not take that for a success.
:func:`pass_exit` turns a pass's result into one exit code and a one-line summary:

    0  the pass ran with its inputs (held rows hold for reasons of their own)
    1  the pass failed unexpectedly (a bug: the log says what)
    2  bad input: flags, kubeconfig, files
    3  the Kubernetes API server could not be reached (policies or workloads not listed)
    4  Prometheus could not be reached (containers held NoMetrics)
    5  the sizing API could not be reached or refused the calls (containers held NoModel)
    6  every container is held for missing inputs (NoMetrics, QueryFailed, NoModel …)
       although the services answered: e.g. a rate metric that has no series, no model trained
    7  (run --once) the leader Lease stayed held by another replica: no pass ran

When several apply, the first in the order 3, 4, 5 wins (the others are named in the
summary). Pure apart from the two probes passed in (each answers None when the service
is reachable, else why not) — they are only called when rows point at that service.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from enum import IntEnum
from typing import Any

__all__ = ["ExitCode", "PassExit", "pass_exit", "EXIT_CODES_HELP"]


class ExitCode(IntEnum):
    OK = 0
    FAILED = 1
    BAD_INPUT = 2
    CLUSTER_UNREACHABLE = 3
    PROMETHEUS_UNREACHABLE = 4
    SIZING_API_UNREACHABLE = 5
    NO_INPUTS = 6
    LEASE_HELD = 7


#: the exit codes as the --help of plan and run --once print them (plain text)
EXIT_CODES_HELP = """\
Exit status (for scripts; a one-line summary goes to stderr when it is not 0):
  0  the pass ran with its inputs (changes proposed or not)
  1  the pass failed unexpectedly (see the log)
  2  bad input: a flag, the kubeconfig, a file
  3  the Kubernetes API server could not be reached
  4  Prometheus could not be reached (containers held NoMetrics)
  5  the sizing API could not be reached or refused the calls (held NoModel)
  6  every container is held for missing inputs (no rate or no model
     answer: NoMetrics, QueryFailed, NoModel ...) although every service answered
  7  (run --once) the leader Lease stayed held by another replica: no pass ran
"""

Probe = Callable[[], "str | None"]

#: held reasons that mean "this container's rate is missing" / "its model answer is missing"
RATE_MISSING = frozenset({"NoMetrics", "QueryFailed", "QueryRefused", "TooManySeries"})
MODEL_MISSING = frozenset({"NoModel", "InvalidModelKey", "DemandOutOfRange"})


@dataclass(frozen=True)
class PassExit:
    code: ExitCode
    #: one line for stderr ('' when the code is OK)
    summary: str


def _first(errors: Sequence[str], prefix: str) -> str | None:
    return next((e for e in errors if e.startswith(prefix)), None)


def _short(text: str, limit: int = 240) -> str:
    text = " ".join(text.split())
    return text if len(text) <= limit else text[: limit - 1] + "…"


def pass_exit(result: Any, *, prometheus: Probe | None = None, sizing: Probe | None = None) -> PassExit:
    """The exit code of a pass (``stages.outcome.PassResult``). ``prometheus``/``sizing``:
    probes of the services (None: not probed, e.g. rates from a replay file)."""
    errors = tuple(getattr(result, "errors", ()) or ())
    outcome = str(getattr(getattr(result, "outcome", ""), "value", getattr(result, "outcome", "")))
    rows = tuple(getattr(result, "rows", ()) or ())
    whys = [set(getattr(r, "why", ()) or ()) for r in rows]
    found: list[tuple[ExitCode, str]] = []
    if outcome == "failed":
        found.append((ExitCode.CLUSTER_UNREACHABLE,
                      f"the Kubernetes API server could not be reached ({_short(errors[0]) if errors else 'no answer'}); "
                      "check --kubeconfig/--context and that the cluster is up"))
    elif any("ApiUnavailable" in w for w in whys):
        failed = _first(errors, "list ") or "a LIST failed"
        found.append((ExitCode.CLUSTER_UNREACHABLE,
                      f"the Kubernetes API server did not answer every LIST ({_short(failed)}); those workloads are held"))
    no_metrics = sum(1 for w in whys if "NoMetrics" in w)
    no_model = sum(1 for w in whys if "NoModel" in w)
    if no_metrics and prometheus is not None and (why := prometheus()) is not None:
        found.append((ExitCode.PROMETHEUS_UNREACHABLE,
                      f"Prometheus could not be reached ({_short(why)}); {no_metrics} containers held NoMetrics; "
                      "check --prometheus"))
    sizing_error = _first(errors, "sizing API")
    sizing_why = sizing_error if (no_model and sizing_error) else (sizing() if (no_model and sizing) else None)
    if sizing_why is not None:
        why = sizing_why
        found.append((ExitCode.SIZING_API_UNREACHABLE,
                      f"the sizing API could not be used ({_short(why)}); {no_model} containers held NoModel; "
                      "check --sizing-api and --sizing-token-file"))
    if found:
        code, text = found[0]
        others = "; ".join(t for _, t in found[1:])
        return PassExit(code, text + (f"; also: {others}" if others else ""))
    if rows and all(w & (RATE_MISSING | MODEL_MISSING) for w in whys):
        no_rate = sum(1 for w in whys if w & RATE_MISSING)
        return PassExit(ExitCode.NO_INPUTS,
                        f"every container ({len(rows)}) is held for missing inputs ({no_rate} without a rate, "
                        f"{len(rows) - no_rate} without a model answer): check the rate queries (ratefit check) "
                        "and the models (ratefit models list)")
    return PassExit(ExitCode.OK, "")


def prometheus_probe(rates: Any) -> Probe | None:
    """A probe of the Prometheus behind a rate source (None for a replay: nothing to reach)."""
    client = getattr(rates, "client", None)
    if client is None or not hasattr(client, "query"):
        return None

    def probe() -> str | None:
        from ratefit.models.errors import PrometheusUnavailable, RatefitError

        try:
            client.query("vector(1)")
        except PrometheusUnavailable as exc:
            return str(exc)
        except RatefitError:
            return None  # it answered (with an error of its own): reachable
        return None

    return probe


def sizing_probe(sizing: Any) -> Probe | None:
    """A probe of the sizing API (its readiness route)."""
    if sizing is None or not hasattr(sizing, "health"):
        return None

    def probe() -> str | None:
        from ratefit.models.errors import RatefitError

        try:
            sizing.health()
        except RatefitError as exc:
            return str(exc)
        return None

    return probe
