"""The demo, end to end on one machine, with the INVENTED Kestrel Post scenario.

INVENTED DATA: Kestrel Post is a fictional parcel company (``models/scenario``).

:func:`run_demo` does, showing progress on stderr:

1. writes the scenario's history as OpenMetrics (and per-key CSV samples);
2. if ``prometheus`` and ``promtool`` are installed: backfills the history into a
   fresh TSDB (``promtool tsdb create-blocks-from openmetrics``) and starts the real
   Prometheus on a free loopback port; otherwise the rates are replayed from the file
   (the output says which);
3. trains every model the example policies name as ``ratefit train --from-policies``
   does (worker processes; cross-validated candidates, conformal band): from the real
   Prometheus when it runs, else from the scenario's CSVs; a Markdown report + plot per key;
4. starts the sizing API (a ``ratefit serve`` subprocess on a free loopback port);
5. starts the sandbox API server loaded with the SizingPolicy CRD, the scenario's
   workloads and HPA, and the example policies (``manifests/``);
6. runs ONE reconcile pass in forced dry-run (status and Events are written to the
   sandbox, nothing is patched), then a second, read-only dry-run pass at a simulated
   time past the longest ``settle`` (as if the rates stayed the same) so the review also
   shows where the decreases now "Settling" will go; both reviews are returned and
   written as Markdown;
7. replays the whole history pass by pass (``controller/replay``): what the example
   policies would have done, in CPU-hours, shortfall, rollouts and nodes; the summary is
   printed and the plots go to ``replay/``;
8. stops everything it started — on success, on error and on Ctrl-C. With
   ``keep=True`` it first waits (Ctrl-C) so the sandbox can be explored with the
   kubeconfig it wrote.
"""

from __future__ import annotations

import contextlib
import shutil
import sys
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ratefit.controller import local_servers
from ratefit.models.errors import RatefitError

__all__ = ["DemoResult", "DemoError", "RUN_MARKER", "prepare_run_dir", "run_demo", "repo_manifests", "start_prometheus", "start_serve", "prometheus_binaries"]

Progress = Callable[[str], None]


def _say(msg: str) -> None:
    print(f"ratefit demo: {msg}", file=sys.stderr, flush=True)


@dataclass(frozen=True)
class DemoResult:
    rows: tuple[Any, ...]  # review.ReviewRow of the pass now
    #: the same world one settle period later (as if the rates stayed the same), read only
    rows_after_settle: tuple[Any, ...]
    simulated_at: Any  # datetime of the second pass
    out: Path
    review_markdown: Path
    rate_source: str  # "prometheus" | "replay"
    kubeconfig: Path
    seconds: float
    history_end: float


class DemoError(RatefitError):
    """A part of the demo could not be started; the message says which and why."""


#: written into ``DIR/run`` when the demo creates it; only a directory holding it is
#: ever deleted by a later demo
RUN_MARKER = ".ratefit-demo-run"
_MARKER_TEXT = "created by `ratefit demo`; the next demo with the same --out deletes this directory\n"


def prepare_run_dir(work: Path) -> Path:
    """An empty ``work`` directory for this run. An existing one is deleted only when the
    demo created it (it holds :data:`RUN_MARKER` and is a real directory, not a symlink);
    anything else is refused with a :class:`DemoError` naming the path and what to do."""
    if work.is_symlink() or (work.exists() and not work.is_dir()):
        raise DemoError(f"refusing to delete {work}: it is not a directory the demo created "
                        "(a symlink or a file); choose another --out or remove it yourself")
    if work.exists():
        marker = work / RUN_MARKER
        if marker.is_symlink() or not marker.is_file():
            raise DemoError(f"refusing to delete {work}: it was not created by `ratefit demo` "
                            f"(no {RUN_MARKER} marker inside); choose another --out or remove it yourself")
        shutil.rmtree(work)
    work.mkdir()
    (work / RUN_MARKER).write_text(_MARKER_TEXT, encoding="utf-8")
    return work


def repo_manifests() -> Path:
    """The repository's ``manifests/`` (the CRD and the example policies)."""
    here = Path(__file__).resolve().parent.parent / "manifests"
    if not (here / "crd" / "sizingpolicy.yaml").is_file():
        raise DemoError(
            f"cannot find manifests/crd/sizingpolicy.yaml next to the package ({here}); "
            "run the demo from a source checkout (pip install -e .)"
        )
    return here


def prometheus_binaries() -> tuple[str, str] | None:
    return local_servers.prometheus_binaries()


@contextlib.contextmanager
def start_prometheus(openmetrics: Path, work: Path, *, timeout: float = 60.0) -> Iterator[str]:
    """Backfill ``openmetrics`` into ``work/tsdb`` and serve it; yields the base URL."""
    try:
        local_servers.backfill(openmetrics, work / "tsdb")
        with local_servers.run_prometheus(work / "tsdb", ready_timeout=timeout) as srv:
            yield srv.url
    except local_servers.LocalServerError as exc:
        raise DemoError(str(exc)) from exc


@contextlib.contextmanager
def start_serve(store: Path, work: Path, *, timeout: float = 60.0) -> Iterator[str]:
    """A ``ratefit serve`` subprocess over ``store`` on a free loopback port; yields its URL."""
    try:
        with local_servers.run_serve(store, work, timeout=timeout) as srv:
            yield srv.url
    except local_servers.LocalServerError as exc:
        raise DemoError(str(exc)) from exc


def train_scenario(samples_dir: Path, store_dir: Path, reports_dir: Path, *, progress: Progress,
                   csv_paths: dict[str, Path], policies: Path | None = None, prometheus: Any = None) -> list[str]:
    """Train every model the example policies name, the way ``ratefit train --from-policies``
    does (``controller/train_policies``): from the real Prometheus when ``prometheus`` is a
    ``PromSource``, else from the scenario's per-key CSVs in ``samples_dir``; worker
    processes; artifacts and reports written. Returns the keys trained."""
    from ratefit.controller.rate_template import RateTemplate
    from ratefit.controller.train_policies import (CsvSource, Result, default_jobs, read_policy_files,
                                                   train_from_policies)
    from ratefit.models.scenario.services import REQUEST_METRIC

    summary = train_from_policies(
        read_policy_files([policies or repo_manifests() / "examples"]),
        source=prometheus if prometheus is not None else CsvSource(str(samples_dir)),
        store_dir=store_dir, max_age_s=0.0, jobs=min(default_jobs(), len(csv_paths)),
        template=RateTemplate(metric=REQUEST_METRIC), report_dir=reports_dir)
    for i, o in enumerate(summary.outcomes, 1):
        if o.result is Result.FAILED:
            progress(f"[{i}/{len(summary.outcomes)}] {o.model} FAILED: {o.detail}")
            continue
        vs = f", fixed allocation {o.baseline_rmse * 1000:.1f}m" if o.baseline_rmse is not None else ""
        progress(f"[{i}/{len(summary.outcomes)}] trained {o.model}: chose {o.estimator} "
                 f"(CV RMSE {o.cv_rmse * 1000:.1f}m{vs}) in {o.seconds:.1f}s")
    if not summary.ok:
        bad = [f"{o.model}: {o.detail}" for o in summary.outcomes if o.result is Result.FAILED]
        bad += [f"policy {p.policy}: {p.message}" for p in summary.problems]
        raise DemoError("training failed: " + "; ".join(bad))
    return [o.model for o in summary.outcomes]


def run_demo(
    *,
    out: Path,
    keep: bool = False,
    hours: float = 168.0,
    step_s: float = 60.0,
    use_prometheus: bool | None = None,
    progress: Progress = _say,
    wait: Callable[[], None] | None = None,
) -> DemoResult:
    """Run the whole demo (see the module docstring). ``use_prometheus`` None: when
    installed. ``wait`` is called before stopping when ``keep`` (default: until Ctrl-C)."""
    from ratefit.controller.kube import KubeAdapter
    from ratefit.controller.metrics_source import PrometheusRateSource, RateTemplate, ReplayRateSource
    from ratefit.controller.reconcile import PassOutcome, ReconcileConfig, Reconciler
    from ratefit.controller.review import to_markdown
    from ratefit.controller.sandbox import SandboxServer
    from ratefit.controller.sizing_client import SizingClient
    from ratefit.models.prometheus import PrometheusClient
    from ratefit.models.scenario import write_csv, write_manifests, write_openmetrics
    from ratefit.models.scenario.services import ORGANISATION, REQUEST_METRIC

    t_start = time.monotonic()
    out = Path(out).resolve()
    out.mkdir(parents=True, exist_ok=True)
    from ratefit.controller.sandbox import kubeconfig as sandbox_kubeconfig
    from ratefit.controller.sandbox.server import CONTEXT

    # before any work: the demo writes DIR/kubeconfig, never over a user's own file
    sandbox_kubeconfig.check_target(out / "kubeconfig", CONTEXT, what="the demo's kubeconfig",
                                    fix="choose another --out, or move that file")
    work = prepare_run_dir(out / "run")
    manifests = repo_manifests()
    progress(f"scenario: {ORGANISATION} — INVENTED data; output in {out}")
    end = float(int(time.time() // step_s) * step_s - 5 * step_s)
    info = write_openmetrics(work / "history.om", end=end, hours=hours, step_s=step_s, seed=0)
    # a week of training samples at 5-minute steps (at 60 s the training would take minutes; longer
    # steps than the 5-minute warm-up span would all be cleaned away as warm-up)
    csv_paths = write_csv(out / "samples", seed=0, hours=hours, step_s=step_s if hours <= 24 else 300.0, end=end)
    progress(f"history: {info.series} series, {info.samples} samples over {hours:g}h at {step_s:g}s steps")
    if use_prometheus is None:
        use_prometheus = prometheus_binaries() is not None
    with contextlib.ExitStack() as stack:
        template = RateTemplate(metric=REQUEST_METRIC)
        if use_prometheus:
            progress("backfilling the history into a real Prometheus (promtool) …")
            prom_url = stack.enter_context(start_prometheus(info.path, work))
            prom = PrometheusClient(prom_url, timeout=30.0)
            stack.callback(prom.close)
            rates: Any = PrometheusRateSource(prom, at=info.end, template=template)
            source = "prometheus"
            progress(f"rates: the real Prometheus at {prom_url} (history backfilled with promtool)")
        else:
            rates = ReplayRateSource(info.path, at=info.end, template=template)
            source = "replay"
            if prometheus_binaries():
                progress(f"rates: replayed from {info.path} as asked (--replay; same numbers as a "
                         "Prometheus holding that history)")
            else:
                progress(f"rates: Prometheus is not installed (no prometheus/promtool), so the demo replays "
                         f"the history file {info.path} instead (same numbers as a Prometheus holding it)")
        progress(f"training the {len(csv_paths)} models the policies name, as `ratefit train --from-policies` does, "
                 f"from {'Prometheus' if use_prometheus else 'the CSV samples'} (k-fold CV over every candidate) …")
        from ratefit.controller.train_policies import PromSource

        train_source = PromSource(prom_url, start=info.end - hours * 3600, end=info.end, step=step_s,
                                  step_text=f"{step_s:g}s") if use_prometheus else None
        train_scenario(out / "samples", work / "store", out / "reports", progress=progress, csv_paths=csv_paths,
                       policies=manifests / "examples", prometheus=train_source)
        api_url = stack.enter_context(start_serve(work / "store", work))
        progress(f"sizing API: ratefit serve at {api_url}")
        scenario_dir = work / "scenario-manifests"
        write_manifests(scenario_dir)
        sandbox = SandboxServer(host="127.0.0.1", port=0, load=(
            manifests / "crd" / "sizingpolicy.yaml",
            scenario_dir,
            manifests / "examples",
        )).start()
        stack.callback(sandbox.stop)
        kubeconfig = out / "kubeconfig"
        sandbox.write_kubeconfig(kubeconfig)
        progress(f"sandbox API server (a local stand-in, not a cluster) at {sandbox.url}; kubeconfig {kubeconfig}")
        kube = KubeAdapter.from_kubeconfig(str(kubeconfig), identity="ratefit-demo")
        stack.callback(kube.close)
        sizing = SizingClient(api_url, timeout=30.0)
        stack.callback(sizing.close)
        rec = Reconciler(kube=kube, rates=rates, sizing=sizing,
                         config=ReconcileConfig(dry_run=True, write=True, identity="ratefit-demo"))
        progress("one reconcile pass in dry-run (status and Events written to the sandbox; nothing patched) …")
        result = rec.run_pass()
        if result.outcome is PassOutcome.FAILED:
            raise DemoError(f"the reconcile pass failed: {'; '.join(result.errors)}")
        for err in result.errors:
            progress(f"warning: {err}")
        # a second, read-only dry-run pass with the clock past the longest settle period, so a
        # reviewer sees what the decreases now "Settling" will come to if the rates stay as they are
        from datetime import datetime, timedelta, timezone

        from ratefit.controller.policy import PolicyInvalid, parse_policy
        from ratefit.controller.reconcile import policy_object_dict

        settles = []
        for obj in kube.list_policies().items:
            try:
                settles.append(parse_policy(policy_object_dict(obj)).settle_s)
            except PolicyInvalid:
                pass
        simulated = datetime.now(timezone.utc) + timedelta(seconds=max(settles, default=0.0) + 60)
        sim_label = simulated.strftime("%Y-%m-%d %H:%M:%SZ")
        progress(f"pass 2 at simulated time {sim_label} (after the longest settle, as if the rates stayed the same; "
                 "read only) …")
        rec2 = Reconciler(kube=kube, rates=rates, sizing=sizing, wall_clock=lambda: simulated,
                          config=ReconcileConfig(dry_run=True, write=False, identity="ratefit-demo"))
        result2 = rec2.run_pass()
        md = out / "review.md"
        md.write_text(
            to_markdown(result.rows, title="ratefit review — Kestrel Post (INVENTED demo scenario)")
            + f"\n## Pass 2 at simulated time {sim_label}\n\nThe same world after the longest settle period, "
            "as if the rates stayed the same (nothing written):\n\n"
            + to_markdown(result2.rows)
            + f"\nRates from: {'the real Prometheus (backfilled history)' if source == 'prometheus' else 'a replay of the history file'}"
            f", evaluated at the history's end ({time.strftime('%Y-%m-%d %H:%M:%SZ', time.gmtime(info.end))}).\n"
            "Training reports: reports/*.md\n",
            encoding="utf-8",
        )
        from ratefit.controller.replay.demo_step import replay_demo

        progress("replay: what the example policies would have done over the whole history, pass every 5 min "
                 f"(as if in apply mode); plots in {out / 'replay'} …")
        progress("replay summary:\n" + replay_demo(
            history=info.path, store=work / "store", manifests=(scenario_dir, manifests / "examples"),
            out=out / "replay", request_metric=REQUEST_METRIC,
            prometheus_url=getattr(getattr(rates, "client", None), "base_url", None)))
        if keep:
            progress(f"--keep: everything keeps running; try  kubectl --kubeconfig {kubeconfig} get sizingpolicies -A ; "
                     "Ctrl-C stops it all")
            try:
                (wait or _wait_forever)()
            except KeyboardInterrupt:
                pass
        progress("stopping everything the demo started …")
    return DemoResult(rows=result.rows, rows_after_settle=result2.rows, simulated_at=simulated, out=out, review_markdown=md, rate_source=source, kubeconfig=kubeconfig,
                      seconds=time.monotonic() - t_start, history_end=info.end)


def _wait_forever() -> None:
    while True:
        time.sleep(3600)
