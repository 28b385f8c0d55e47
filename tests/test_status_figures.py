"""A status whose only news is figures is written at most once per period (stages/write.py).

Rates move a little at every refresh. Before this, a pass after a refresh that moved
every rate by 2 % rewrote all 10,000 statuses of the benchmark (tests/bench/bench_cache.py,
2026-12-02): 45 s of writes and as many requests to the API server, for figures nobody
acts on. Decisions, reasons, requests, conditions' statuses and the settling history the
next decision reads are still written at once.

Real parts: the sandbox API server, the real ``ratefit serve`` (tests/reconcile_fixtures.
LINEAR curves: demand 0.05 + 0.004 × rate cores, band 0.02), the replayed rate history;
an injected clock. INVENTED scenario, namespace ``shop``. Kubernetes semantics relied on:
every status write gives the object a new resourceVersion (API concepts, "Resource
versions"), so the test counts writes by resourceVersion as well as by the pass's count.
"""

from __future__ import annotations

import contextlib
import time
from typing import Any

import pytest

from reconcile_fixtures import deployment, policy, shared_sizing_api, world  # noqa: F401
from ratefit.controller.reconcile import ReconcileConfig, Reconciler
from ratefit.controller.stages.record import decisional, figures_only
from test_steady_pass import Clock, OverriddenRates

ROW = {"name": "app", "current": "1", "newRequest": "500m", "target": "315m", "demand": "250m",
       "demandBound": "270m", "rate": 50.0, "verdict": "Proposed", "reason": "StepLimited", "message": "lower to 500m"}
COND = {"type": "Ready", "status": "True", "reason": "Decided", "message": "1 containers decided: 1 proposed",
        "observedGeneration": 1, "lastTransitionTime": "2026-12-02T06:00:00Z"}
STATUS = {"observedGeneration": 1, "containers": [ROW], "conditions": [COND], "summary": "1 proposed"}


def _with(row: dict | None = None, cond: dict | None = None, **top: Any) -> dict[str, Any]:
    return {**STATUS, "containers": [{**ROW, **(row or {})}], "conditions": [{**COND, **(cond or {})}], **top}


@pytest.mark.parametrize("new, only_figures", [
    (_with({"rate": 51.0, "demand": "255m", "demandBound": "275m", "target": "320m"}), True),
    (_with({"message": "lower to 500m (target 320m)"}), True),  # words only (never written alone anyway)
    (_with(cond={"message": "1 containers decided: 1 proposed (ratio 0.03)"}), True),
    (_with({"newRequest": "450m"}), False),  # what is proposed
    (_with({"verdict": "Held", "reason": "InsideDeadband"}), False),
    (_with({"current": "900m"}), False),  # the workload changed
    (_with({"peakTarget": "320m", "belowSinceTime": "2026-12-02T06:05:00Z"}), False),  # history the next pass reads
    (_with(cond={"status": "False", "reason": "InputsMissing"}), False),
    (_with(summary="1 held"), False),
    (_with(lastChangeTime="2026-12-02T06:05:00Z"), False),
])
def test_what_counts_as_figures(new, only_figures) -> None:
    assert figures_only(new, STATUS) is only_figures
    assert (decisional(new) == decisional(STATUS)) is only_figures


def _objects() -> list[dict[str, Any]]:
    return [
        # DryRun, 1000m: proposes a decrease to 315m (0.05 + 0.2 + 0.02 = 0.27 × 1.15, rounded up
        # to 5m; the fixture's step limits are wide)
        deployment("shop", "b", [("app", "1000m", None)]),
        policy("shop", "b", workload="b", mode="DryRun", containers=[{"name": "app", "model": "shop/b/app"}]),
        # DryRun, 100m: proposes a raise to 315m
        deployment("shop", "c", [("app", "100m", None)]),
        policy("shop", "c", workload="c", mode="DryRun", containers=[{"name": "app", "model": "shop/c/app"}]),
    ]


def test_figures_wait_for_the_period_and_decisions_do_not(tmp_path, shared_sizing_api) -> None:
    with contextlib.ExitStack() as stack:
        w = stack.enter_context(world(tmp_path, objects=_objects(), api_url=shared_sizing_api,
                                      rates={("shop", "b"): [50.0], ("shop", "c"): [50.0]},
                                      end=float(int(time.time() - 120))))
        clock = Clock()
        rates = OverriddenRates(w.rates())
        rec = Reconciler(kube=w.kube(), rates=rates, sizing=w.sizing(),
                         config=ReconcileConfig(status_figures_every_s=300.0),
                         wall_clock=lambda: clock.wall, monotonic=lambda: clock.mono)

        def stored(name: str) -> tuple[str, dict[str, Any]]:
            o = w.get(f"/apis/ratefit.dev/v1alpha1/namespaces/shop/sizingpolicies/{name}")
            return o["metadata"]["resourceVersion"], o["status"]["containers"][0]

        def deferred() -> float:
            return rec.telemetry.registry.get_sample_value("ratefit_controller_status_writes_total",
                                                           {"outcome": "deferred"}) or 0.0

        first = rec.run_pass()
        assert first.status_writes == 2 and deferred() == 0
        rv_b, row_b = stored("b")
        rv_c, row_c = stored("c")
        assert (row_b["newRequest"], row_c["newRequest"]) == ("315m", "315m")
        assert row_b["rate"] == pytest.approx(50.0)

        # −2 % on b: rate, demand and band move; the target is 310m now, but a decrease goes
        # to the highest target seen while settling (decide.py step 4: 315m, the settling
        # record unchanged) and the 315m proposal stands → only figures: deferred. (+2 % would
        # raise that peak to 320m: history the next decision reads, written at once.)
        rates.override.update({"shop/b/app": 49.0})
        clock.tick(60.0)
        second = rec.run_pass()
        assert second.status_writes == 0 and deferred() == 1
        assert stored("b") == (rv_b, row_b)  # not written: the same resourceVersion
        # the pass's rows show the new figures at once (the review reads the pass, not the status)
        assert [r.rate for r in second.rows if r.policy == "b"] == [pytest.approx(49.0)]

        # c's load falls to 20 req/s: 0.05 + 0.08 + 0.02 = 0.15 × 1.15 → 175m, 140m from the
        # 315m proposal (more than its 10 % deadband): a new proposal, written at once
        rates.override.update({"shop/c/app": 20.0})
        clock.tick(60.0)
        third = rec.run_pass()
        assert third.status_writes == 1 and deferred() == 2  # b deferred again, c written
        assert stored("c")[1]["newRequest"] == "175m" and stored("c")[0] != rv_c
        assert third.events == 2  # CpuRequestProposed on the workload and on the policy

        # past b's period (300 s × [1, 1.5), by its uid): its figures are written
        clock.tick(460.0)
        fourth = rec.run_pass()
        assert fourth.status_writes == 1
        rv_b2, row_b2 = stored("b")
        assert rv_b2 != rv_b and row_b2["rate"] == pytest.approx(49.0) and row_b2["newRequest"] == "315m"
        assert fourth.events == 0  # figures are not news

        # and then nothing is left to write
        clock.tick(60.0)
        assert rec.run_pass().status_writes == 0 and deferred() == 2


def test_off_writes_every_change_at_once(tmp_path, shared_sizing_api) -> None:
    with world(tmp_path, objects=_objects()[:2], api_url=shared_sizing_api, rates={("shop", "b"): [50.0]},
               end=float(int(time.time() - 120))) as w:
        rates = OverriddenRates(w.rates())
        rec = Reconciler(kube=w.kube(), rates=rates, sizing=w.sizing(), config=ReconcileConfig())
        assert rec.run_pass().status_writes == 1
        rates.override.update({"shop/b/app": 51.0})
        assert rec.run_pass().status_writes == 1  # the library default: 0 (off); `ratefit run` says 5m
