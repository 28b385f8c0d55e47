"""ratefit.controller.stages — one reconcile pass as named stages, one idea per module.

- ``ports.py`` — the typed interfaces the stages need: ``KubeReader`` (list/read, LIST-
  or cache-backed), ``KubeWriter`` (patch, resize, annotate, status, Events), ``Kube``
  (both), ``RateSource``, ``SizingSource``.
- ``observe.py`` — reads everything once and builds a frozen ``Snapshot``: policies
  (parsed), workloads, pods for in-place, HPAs, rates, sizing answers; a failed LIST
  marks its policies ``unavailable`` (never "not found").
- ``decide.py`` — applies the pure rules of ``controller/decide.py`` to the snapshot;
  owns the global budget (seeded after a start) and the backoff deadlines.
- ``act.py`` — server-side dry run, patch, in-place resize, 409 re-read + recompute, backoff.
- ``record.py`` — PURE: new status (validated by the CRD's status model), Events,
  decision log records and review rows, built from observation + decision.
- ``write.py`` — writes what ``record`` built (status only when it changed — when only
  figures changed, at most every ``status_figures_every_s`` per policy — then Events, logs).
- ``steady.py`` — the steady-state memo: a policy whose inputs (policy and workload
  resourceVersions, rates, sizing answers, …) are those of its last pass, and whose last
  decision was a fixed point that read neither the clock nor the budget, reuses that
  decision, its review rows and its status verdict (work proportional to what changed).
- ``outcome.py`` — ``PassOutcome`` and ``PassResult``, what a pass came to.
- ``crash.py`` — the ``RATEFIT_CRASH_AT`` test hook.
- ``orchestrator.py`` — ``Reconciler``: runs the stages in order; the one place where a
  pass outcome becomes metrics and the pass log line.

Adding a hold reason that needs a new observation touches:
1. ``observe.py`` — read it and put it in the snapshot (a new field of ``Observed`` or
   of ``ContainerInput`` in ``controller/decide.py``);
2. ``controller/decide.py`` — a new ``Why`` value and the rule that holds with it;
3. ``manifests/crd/sizingpolicy.yaml`` — the new value in the status ``why`` enum;
4. their tests (``tests/test_decide_table.py`` for the rule, ``tests/test_reconcile.py``
   or ``tests/test_faults_*.py`` for the observation against the sandbox).
``record.py`` needs nothing: it writes whatever ``Why`` the decision carries, and
``steady.py`` needs nothing either: its memo compares every field of ``Observed`` and
``ContainerInput`` (a hold that waits on the clock must be added to its
``CLOCK_OR_BUDGET``, though).
"""
