"""One bad input harms only itself (issue 9, item 1): a container whose model the sizing
API cannot answer — unknown, or a rate whose demand would be beyond any physical bound —
is held with its own reason and message, and every other container of every other policy
is decided and changed as usual in the same pass.

Real parts: the sandbox API server, a real ``ratefit serve`` over a store of closed-form
curves (tests/reconcile_fixtures.py), the real replay rate source. INVENTED scenario.
"""

from __future__ import annotations

from ratefit.controller.decide import ContainerInput, Sizing, Verdict, Why, decide_workload
from ratefit.controller.policy import WorkloadHistory
from ratefit.controller.stages.observe import sizing_problem
from ratefit.controller.sizing_client import DemandError

from decide_fixtures import NOW, make_policy
from reconcile_fixtures import deployment, policy, world

LINEAR = {"base": 0.05, "slope": 0.004, "band": 0.02}


def test_an_unknown_model_holds_only_its_own_container_and_the_other_policies_change(tmp_path) -> None:
    objects = [
        deployment("shop", "web", [("app", "100m", None), ("side", "100m", None)]),
        policy("shop", "web", workload="web", containers=[{"name": "app", "model": "shop/web/app"},
                                                           {"name": "side", "model": "shop/web/ghost"}]),
        deployment("shop", "api", [("app", "100m", None)]),
        policy("shop", "api", workload="api", containers=[{"name": "app", "model": "shop/api/app"}]),
    ]
    rates = {("shop", "web"): [50.0, 50.0], ("shop", "api"): [50.0, 50.0]}
    models = {"shop/web/app": LINEAR, "shop/api/app": LINEAR}  # shop/web/ghost is not in the store
    with world(tmp_path, objects=objects, rates=rates, models=models) as w:
        result = w.reconciler().run_pass()
        rows = {(r.namespace, r.workload, r.container): r for r in result.rows}
        ghost = rows[("shop", "web", "side")]
        assert ghost.verdict == Verdict.HELD.value and ghost.why == (Why.NO_MODEL.value,)
        assert "shop/web/ghost" in ghost.note
        # the same workload's other container and the other policy change in the same pass
        assert rows[("shop", "web", "app")].verdict == Verdict.CHANGED.value
        assert rows[("shop", "api", "app")].verdict == Verdict.CHANGED.value
        assert w.cpu("shop", "api", "app")[0] != "100m"
        assert w.cpu("shop", "web", "app")[0] != "100m" and w.cpu("shop", "web", "side")[0] == "100m"


def test_item_errors_of_the_sizing_api_map_to_their_own_reasons() -> None:
    assert sizing_problem(DemandError(model="a/b/c", error="no such model", reason="unknown_model")) == \
        ("NoModel", "no such model")
    assert sizing_problem(DemandError(model="A/b/c", error="not a key", reason="invalid_model"))[0] == "InvalidModelKey"
    assert sizing_problem(DemandError(model="a/b/c", error="too much", reason="out_of_range"))[0] == "DemandOutOfRange"
    assert sizing_problem({"model": "a/b/c", "demand_m": 10, "demand_bound_m": 12}) is None


def test_input_problems_hold_one_container_with_their_reason_and_message() -> None:
    p = make_policy()
    wd = decide_workload(
        p, [ContainerInput("app", 500, None, None, None, rate_problem=("QueryRefused", "selector x needs namespace"))],
        history=WorkloadHistory(), now=NOW,
    )
    (d,) = wd.decisions
    assert d.verdict is Verdict.HELD and d.why is Why.QUERY_REFUSED and "needs namespace" in d.message
    wd = decide_workload(
        p, [ContainerInput("app", 500, None, 10.0, None, sizing_problem=("DemandOutOfRange", "beyond 1024 cores"))],
        history=WorkloadHistory(), now=NOW,
    )
    (d,) = wd.decisions
    assert d.verdict is Verdict.HELD and d.why is Why.DEMAND_OUT_OF_RANGE and "1024" in d.message
    # an unknown reason name from an adapter falls back to the generic one, never crashes
    wd = decide_workload(p, [ContainerInput("app", 500, None, None, None, rate_problem=("Bogus", "x"))],
                         history=WorkloadHistory(), now=NOW)
    assert wd.decisions[0].why is Why.NO_METRICS


def test_a_container_missing_from_the_workload_has_its_own_reason() -> None:
    p = make_policy()
    wd = decide_workload(p, [ContainerInput("other", 500, None, 10.0, Sizing(0.3, 0.4))],
                         history=WorkloadHistory(), now=NOW)
    (d,) = wd.decisions
    assert d.why is Why.CONTAINER_MISSING and "spec.containers" in d.message
