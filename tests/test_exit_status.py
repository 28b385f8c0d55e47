"""The exit code of one pass (controller/exit_status): which input could not be reached,
and an all-NoMetrics review is never a silent success. Pure: the pass results are plain
values and the probes are functions (the real services: tests/test_reconcile_cli.py)."""

from __future__ import annotations

from ratefit.controller.exit_status import ExitCode, pass_exit
from ratefit.controller.review import ReviewRow
from ratefit.controller.stages.outcome import PassOutcome, PassResult


def _row(why: str, verdict: str = "held") -> ReviewRow:
    return ReviewRow(namespace="shop", policy="web", kind="Deployment", workload="web", container=why.lower(),
                     verdict=verdict, why=(why,), current_m=100, replicas=2)


def _calls():
    asked: list[str] = []

    def up(name: str):
        return lambda: asked.append(name) or None

    def down(name: str, why: str):
        return lambda: asked.append(name) or why

    return asked, up, down


def test_a_pass_with_its_inputs_is_zero_and_probes_nothing() -> None:
    asked, up, _ = _calls()
    result = PassResult(outcome=PassOutcome.DONE, rows=(_row("NewTarget", "proposed"), _row("InsideDeadband")))
    assert pass_exit(result, prometheus=up("prom"), sizing=up("sizing")).code is ExitCode.OK
    assert asked == []  # no row points at a service: nothing is probed


def test_each_unreachable_input_has_its_own_code() -> None:
    _, up, down = _calls()
    failed = PassResult(outcome=PassOutcome.FAILED, errors=("list sizingpolicies: connection refused",))
    assert pass_exit(failed).code is ExitCode.CLUSTER_UNREACHABLE == 3
    lists = PassResult(outcome=PassOutcome.DEGRADED, rows=(_row("ApiUnavailable"),),
                       errors=("list Deployments in shop: 503",))
    ex = pass_exit(lists)
    assert ex.code == 3 and "list Deployments in shop: 503" in ex.summary
    no_rates = PassResult(outcome=PassOutcome.DEGRADED, rows=(_row("NoMetrics"),) * 3)
    ex = pass_exit(no_rates, prometheus=down("prom", "connection refused"), sizing=up("sizing"))
    assert ex.code is ExitCode.PROMETHEUS_UNREACHABLE == 4
    assert "connection refused" in ex.summary and "3 containers held NoMetrics" in ex.summary
    assert "\n" not in ex.summary  # one line
    no_api = PassResult(outcome=PassOutcome.DEGRADED, rows=(_row("NoModel"),),
                        errors=("sizing API: no answer from http://127.0.0.1:1",))
    assert pass_exit(no_api, sizing=up("sizing")).code is ExitCode.SIZING_API_UNREACHABLE == 5
    down_api = PassResult(outcome=PassOutcome.DONE, rows=(_row("NoModel"),))
    assert pass_exit(down_api, sizing=down("sizing", "timeout")).code == 5


def test_several_unreachable_inputs_name_them_all_and_the_cluster_wins() -> None:
    _, _, down = _calls()
    result = PassResult(outcome=PassOutcome.DEGRADED, rows=(_row("ApiUnavailable"), _row("NoMetrics")),
                        errors=("list Deployments in shop: 503",))
    ex = pass_exit(result, prometheus=down("prom", "refused"))
    assert ex.code == 3 and "Prometheus could not be reached" in ex.summary


def test_an_all_no_metrics_review_is_never_a_silent_success() -> None:
    """Every service answered, yet no container had a rate (e.g. a counter name with no
    series): the review is all NoMetrics — a distinct code, not 0."""
    _, up, _ = _calls()
    result = PassResult(outcome=PassOutcome.DEGRADED, rows=(_row("NoMetrics"), _row("NoModel")))
    ex = pass_exit(result, prometheus=up("prom"), sizing=up("sizing"))
    assert ex.code is ExitCode.NO_INPUTS == 6 and "ratefit check" in ex.summary
    other = PassResult(outcome=PassOutcome.DONE, rows=(_row("QueryFailed"), _row("InvalidModelKey")))
    assert pass_exit(other).code == 6  # a failed query or a refused model key is a missing input too
    # one container without a model among decided ones is a per-row matter: 0
    mixed = PassResult(outcome=PassOutcome.DEGRADED, rows=(_row("NoModel"), _row("NewTarget", "proposed")))
    assert pass_exit(mixed, prometheus=up("prom"), sizing=up("sizing")).code is ExitCode.OK
    # no policies at all is not "missing inputs"
    assert pass_exit(PassResult(outcome=PassOutcome.DONE)).code is ExitCode.OK
