"""Train what the SizingPolicies need: ``ratefit train --from-policies`` (and the demo).

The steps, each its own function so the CLI, the demo and the tests share them:

1. **read** the policies — from the cluster (:func:`policies_from_cluster`, through the
   Kubernetes adapter) or from manifest files and folders (:func:`read_policy_files`;
   YAML or JSON, multi-document, ``kind: List`` unwrapped, other kinds ignored);
2. **plan** (:func:`plan_training`, pure apart from reading the store): parse every
   policy, derive each container's rate, CPU and throttling queries
   (``workload_queries.queries_for_policy``; a policy's own ``rateQuery`` passes the
   namespace guard, container by container), keep the model keys the policies name —
   exactly those, once each — and decide per key: *missing* (no artifact), *unreadable*
   (a corrupt artifact), *stale* (trained longer ago than ``max_age``) → train; else
   *up to date*. An invalid policy or a refused query is a problem row, never a stop.
   ``shard=(I, N)`` keeps the keys whose CRC-32 (IEEE, ``zlib.crc32`` of the UTF-8 key)
   modulo N is I — stable across processes and machines, unlike Python's ``hash()`` —
   so the N indexes of an Indexed Job split the keys disjointly and completely; a problem
   with one container (its query refused) belongs to the shard of its model key, an
   invalid policy to the shard of the policy's own ``namespace/name``, so each problem is
   reported by exactly one shard;
3. **train** (:func:`train_models`) the planned keys in worker processes
   (``concurrent.futures.ProcessPoolExecutor``, ``spawn`` start method: no state is
   inherited from a parent that may hold threads and sockets), each reading its samples
   from Prometheus (:class:`PromSource`: ``query_range`` over the look-back window) or
   from a directory of per-key CSVs (:class:`CsvSource`, the demo without Prometheus),
   and writing its artifact into the store atomically. A failing key becomes a
   ``failed`` row with its one-line reason; the others go on. A progress line per
   finished key goes to stderr (plain text: no TTY needed);
4. **summarise** (:class:`TrainingSummary`, :func:`render_summary`): one table (model,
   result, estimator chosen, samples used/total, dropped, CV RMSE of the chosen estimator
   and of the fixed-allocation baseline, trained rate range), then the failures and the
   policy problems with their reasons; ``table``, ``json`` or ``markdown``.

Exit status (:meth:`TrainingSummary.exit_code`): 0 when every key named (in this shard)
is trained or up to date; 1 when some key failed or some policy could not be read (the
others were trained); bad input (flags, unreadable files, no cluster) is 2, raised as
``InputError``/``RatefitError`` before any training.

The module imports no numpy/scikit-learn at the top: the workers set their BLAS thread
count to 1 (one core per worker; ``--jobs`` sets the parallelism) before those load.
"""

from __future__ import annotations

import json
import os
import sys
import time
import zlib
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, replace
from datetime import datetime, timezone
from enum import StrEnum
from pathlib import Path
from typing import Any

from ratefit.models.errors import InputError

__all__ = [
    "PolicySource",
    "PromSource",
    "CsvSource",
    "ModelTask",
    "PolicyProblem",
    "TrainingPlan",
    "Result",
    "ModelOutcome",
    "TrainingSummary",
    "read_policy_files",
    "policies_from_cluster",
    "parse_shard",
    "shard_index",
    "default_jobs",
    "plan_training",
    "train_models",
    "train_from_policies",
    "render_summary",
    "EXIT_OK",
    "EXIT_SOME_FAILED",
]

EXIT_OK = 0
EXIT_SOME_FAILED = 1

Progress = Callable[[str], None]

_POLICY_KIND = "SizingPolicy"
_POLICY_API = "ratefit.dev/v1alpha1"


# ---------------------------------------------------------------------------- inputs
@dataclass(frozen=True)
class PolicySource:
    """One SizingPolicy object as read, and where it came from (a file or the cluster)."""

    origin: str
    obj: Mapping[str, Any]


@dataclass(frozen=True)
class PromSource:
    """Samples from Prometheus: per-pod rate, CPU and throttling over [start, end] every step."""

    url: str
    start: float
    end: float
    step: float
    step_text: str
    timeout: float = 30.0


@dataclass(frozen=True)
class CsvSource:
    """Samples from a directory holding one CSV per key (``models.train.samples_dir_files``)."""

    directory: str


def read_policy_files(paths: Sequence[str | os.PathLike[str]]) -> list[PolicySource]:
    """Every SizingPolicy in ``paths`` (files, or folders read recursively for
    ``*.yaml``, ``*.yml`` and ``*.json``, in sorted order). Other kinds (a Deployment,
    a kustomization) are skipped; unreadable YAML is an InputError naming the file."""
    import yaml

    files: list[Path] = []
    for raw in paths:
        p = Path(raw)
        if p.is_dir():
            files += sorted(q for q in p.rglob("*") if q.suffix in (".yaml", ".yml", ".json") and q.is_file())
        elif p.is_file():
            files.append(p)
        else:
            raise InputError(f"-f {raw}: no such file or directory")
    out: list[PolicySource] = []
    for f in files:
        try:
            docs = list(yaml.safe_load_all(f.read_text(encoding="utf-8")))
        except (OSError, UnicodeDecodeError, yaml.YAMLError) as exc:
            first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
            raise InputError(f"-f {f}: not readable as YAML ({first})") from None
        for i, doc in enumerate(docs):
            items = doc.get("items") if isinstance(doc, dict) and doc.get("kind") == "List" else [doc]
            for obj in items or []:
                if isinstance(obj, dict) and obj.get("kind") == _POLICY_KIND:
                    out.append(PolicySource(origin=f"{f}#{i}", obj=obj))
    return out


def policies_from_cluster(kube: Any, namespaces: Sequence[str] = ()) -> list[PolicySource]:
    """Every SizingPolicy the adapter lists (all namespaces, or the ones given)."""
    listed = kube.list_policies(list(namespaces) or None)
    return [
        PolicySource(
            origin=f"cluster:{o.namespace}/{o.name}",
            obj={"apiVersion": _POLICY_API, "kind": _POLICY_KIND,
                 "metadata": {"namespace": o.namespace, "name": o.name, "generation": o.generation},
                 "spec": dict(o.spec)},
        )
        for o in listed.items
    ]


# ---------------------------------------------------------------------------- sharding
def shard_index(key: str, n: int) -> int:
    """The shard (0..n-1) of ``key``: CRC-32 of its UTF-8 bytes modulo n (stable everywhere)."""
    return zlib.crc32(key.encode("utf-8")) % n


def parse_shard(text: str | None, env: Mapping[str, str] | None = None) -> tuple[int, int] | None:
    """``"I/N"`` → (I, N); ``"auto/N"`` takes I from ``JOB_COMPLETION_INDEX`` (set by
    Kubernetes in each pod of an Indexed Job). None → None (no sharding)."""
    if text is None:
        return None
    env = os.environ if env is None else env
    head, sep, tail = text.partition("/")
    try:
        n = int(tail)
    except ValueError:
        n = 0
    if not sep or n < 1:
        raise InputError(f"--shard {text!r}: expected I/N (e.g. 0/4) or auto/N, with N >= 1")
    if head == "auto":
        idx = env.get("JOB_COMPLETION_INDEX")
        if idx is None:
            raise InputError(f"--shard {text}: JOB_COMPLETION_INDEX is not set (it is set in the pods of an "
                             "Indexed Job); give the index yourself, e.g. --shard 0/" + str(n))
        head = idx
    try:
        i = int(head)
    except ValueError:
        raise InputError(f"--shard {text!r}: the index {head!r} is not a whole number") from None
    if not 0 <= i < n:
        raise InputError(f"--shard {text!r}: the index must lie in 0..{n - 1}")
    return i, n


def default_jobs() -> int:
    """min(4, CPUs this process may use)."""
    try:
        cpus = len(os.sched_getaffinity(0))
    except AttributeError:  # pragma: no cover - not Linux
        cpus = os.cpu_count() or 1
    return max(1, min(4, cpus))


# ---------------------------------------------------------------------------- planning
class Result(StrEnum):
    TRAINED = "trained"
    UP_TO_DATE = "up-to-date"
    FAILED = "failed"


@dataclass(frozen=True)
class ModelTask:
    """One model to train: its key, the policies naming it, its queries and why."""

    model: str
    policies: tuple[str, ...]
    rate_query: str
    cpu_query: str
    throttle_query: str
    why: str  # "missing" | "stale (trained … ago)" | "unreadable (…)"


@dataclass(frozen=True)
class PolicyProblem:
    """A policy (or one of its containers) that names no trainable model, and why."""

    policy: str
    origin: str
    message: str
    model: str = ""  # set when one container's query was refused


@dataclass(frozen=True)
class TrainingPlan:
    tasks: tuple[ModelTask, ...]
    up_to_date: tuple[ModelOutcome, ...]
    problems: tuple[PolicyProblem, ...]
    models_named: int  # distinct model keys the policies name (all shards)
    shard: tuple[int, int] | None = None


def _age_text(seconds: float) -> str:
    from ratefit.models.durations import format_duration

    s = int(seconds) if seconds < 3600 else int(seconds // 60) * 60  # minutes are enough past an hour
    return format_duration(float(s)) if s >= 1 else "0s"


def _trained_at(text: str) -> float:
    return datetime.strptime(text, "%Y-%m-%dT%H:%M:%SZ").replace(tzinfo=timezone.utc).timestamp()


def plan_training(
    sources: Iterable[PolicySource],
    *,
    store_dir: str | os.PathLike[str],
    max_age_s: float,
    now: float,
    template: Any = None,
    interval: str | None = None,
    guard: Any = None,
    shard: tuple[int, int] | None = None,
) -> TrainingPlan:
    """What to train (see the module docstring). ``template`` is the rate template
    (``RateTemplate``; default the http-requests-total convention), ``guard`` the
    ``QueryGuard`` for policies' own ``rateQuery`` (default: the namespace boundary)."""
    from ratefit.controller.policy import PolicyInvalid, parse_policy
    from ratefit.controller.promql_guard import QueryRefused
    from ratefit.controller.rate_template import RateTemplate
    from ratefit.controller.workload_queries import queries_for_policy
    from ratefit.models.errors import ArtifactError, RatefitError, UnknownModel
    from ratefit.models.store import ModelStore

    template = template if template is not None else RateTemplate()
    mine = (lambda key: True) if shard is None else (lambda key: shard_index(key, shard[1]) == shard[0])
    problems: list[PolicyProblem] = []
    wanted: dict[str, tuple[list[str], Any]] = {}  # model → (policies, ContainerQueries)
    conflicts: dict[str, str] = {}
    parsed = []
    for src in sources:
        meta = src.obj.get("metadata") if isinstance(src.obj.get("metadata"), Mapping) else {}
        pkey = f"{meta.get('namespace') or 'default'}/{meta.get('name') or '?'}"
        try:
            parsed.append((pkey, src, parse_policy(src.obj)))
        except PolicyInvalid as exc:
            if mine(pkey):
                problems.append(PolicyProblem(pkey, src.origin, str(exc)))
    for pkey, src, policy in sorted(parsed, key=lambda t: t[0]):
        for c in policy.containers:
            try:
                (pq,) = queries_for_policy(replace(policy, containers=(c,)), template=template,
                                           interval=interval, guard=guard)
            except (QueryRefused, InputError, ValueError) as exc:
                if mine(c.model):
                    problems.append(PolicyProblem(pkey, src.origin, f"container {c.name}: {exc}", model=c.model))
                continue
            if pq.model in wanted:
                wanted[pq.model][0].append(pkey)
                if wanted[pq.model][1] != pq.queries and pq.model not in conflicts:
                    conflicts[pq.model] = pkey
                continue
            wanted[pq.model] = ([pkey], pq.queries)
    for model, first_other in sorted(conflicts.items()):
        if mine(model):
            first = wanted[model][0][0]
            problems.append(PolicyProblem(first_other, "", f"names model {model} with other queries than {first}; "
                                          f"trained with {first}'s (give each policy its own model key)", model=model))
    store = ModelStore(store_dir)
    tasks: list[ModelTask] = []
    fresh: list[ModelOutcome] = []
    for model in sorted(wanted):
        if not mine(model):
            continue
        pols, q = wanted[model]
        why = ""
        try:
            art = store.load(model)
        except UnknownModel:
            why = "missing"
        except (ArtifactError, RatefitError, OSError) as exc:
            why = f"unreadable ({str(exc).splitlines()[0][:160]})"
        else:
            try:
                age = now - _trained_at(art.trained_at)
            except ValueError:
                age = float("inf")
            if age > max_age_s:
                why = f"stale (trained {_age_text(age)} ago)" if age != float("inf") else "stale (no training time)"
            else:
                fresh.append(_outcome_from_artifact(model, tuple(pols), Result.UP_TO_DATE, art,
                                                    detail=f"trained {_age_text(age)} ago"))
        if why:
            tasks.append(ModelTask(model=model, policies=tuple(pols), rate_query=q.rate, cpu_query=q.cpu,
                                   throttle_query=q.throttle, why=why))
    return TrainingPlan(tasks=tuple(tasks), up_to_date=tuple(fresh), problems=tuple(problems),
                        models_named=len(wanted) + len({p.model for p in problems if p.model} - set(wanted)),
                        shard=shard)


# ---------------------------------------------------------------------------- outcomes
@dataclass(frozen=True)
class ModelOutcome:
    """One row of the summary."""

    model: str
    policies: tuple[str, ...]
    result: Result
    detail: str = ""  # why it was trained, how old it is, or why it failed
    estimator: str = ""
    samples_used: int = 0
    samples_total: int = 0
    dropped: tuple[tuple[str, int], ...] = ()
    cv_rmse: float | None = None
    baseline_rmse: float | None = None
    rate_lo: float | None = None
    rate_hi: float | None = None
    seconds: float = 0.0
    path: str = ""

    def as_dict(self) -> dict[str, Any]:
        return {
            "model": self.model, "policies": list(self.policies), "result": self.result.value,
            "detail": self.detail, "estimator": self.estimator or None,
            "samples_used": self.samples_used, "samples_total": self.samples_total,
            "samples_dropped": self.samples_total - self.samples_used, "dropped": dict(self.dropped),
            "cv_rmse_cores": self.cv_rmse, "baseline_rmse_cores": self.baseline_rmse,
            "rate_range": None if self.rate_lo is None else [self.rate_lo, self.rate_hi],
            "seconds": round(self.seconds, 3), "path": self.path or None,
        }


def _outcome_from_artifact(model: str, policies: tuple[str, ...], result: Result, art: Any, *,
                           detail: str, seconds: float = 0.0, path: str = "") -> ModelOutcome:
    chosen = next((r.rmse for r in art.cv if r.model == art.chosen), None)
    fixed = next((r.rmse for r in art.cv if r.model == "fixed"), None)
    return ModelOutcome(
        model=model, policies=policies, result=result, detail=detail, estimator=art.chosen,
        samples_used=art.samples, samples_total=art.samples_total,
        dropped=tuple(sorted((k, int(v)) for k, v in art.dropped.items() if v)),
        cv_rmse=chosen, baseline_rmse=fixed, rate_lo=float(art.rate_range[0]), rate_hi=float(art.rate_range[1]),
        seconds=seconds, path=path,
    )


@dataclass(frozen=True)
class TrainingSummary:
    outcomes: tuple[ModelOutcome, ...]
    problems: tuple[PolicyProblem, ...]
    shard: tuple[int, int] | None = None
    seconds: float = 0.0

    def count(self, result: Result) -> int:
        return sum(1 for o in self.outcomes if o.result is result)

    @property
    def ok(self) -> bool:
        return not self.problems and self.count(Result.FAILED) == 0

    def exit_code(self) -> int:
        return EXIT_OK if self.ok else EXIT_SOME_FAILED

    def by_model(self) -> dict[str, ModelOutcome]:
        return {o.model: o for o in self.outcomes}


# ---------------------------------------------------------------------------- training
@dataclass(frozen=True)
class _WorkerJob:
    """Everything one worker needs, in plain picklable values."""

    task: ModelTask
    source: PromSource | CsvSource
    store_dir: str
    options: tuple[tuple[str, Any], ...]
    estimators: tuple[str, ...] | None
    report_dir: str | None


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split()) or type(exc).__name__
    return text if len(text) <= 400 else text[:397] + "..."


def _samples_for(job: _WorkerJob):
    from ratefit.models.samples import Samples, load_csv
    from ratefit.models.store import DataWindow
    from ratefit.models.train import rfc3339, samples_dir_files

    src, t = job.source, job.task
    if isinstance(src, CsvSource):
        files = samples_dir_files(src.directory)
        if t.model not in files:
            raise InputError(f"no samples file for {t.model} in {src.directory} "
                             f"(expected {t.model.replace('/', '__')}.csv)")
        return load_csv(files[t.model]), None
    from ratefit.models.prometheus import PrometheusClient
    from ratefit.models.prometheus_samples import fetch_samples

    with PrometheusClient(src.url, timeout=src.timeout) as client:
        rows = fetch_samples(client, rate_query=t.rate_query, cpu_query=t.cpu_query,
                             throttle_query=t.throttle_query, start=src.start, end=src.end, step=src.step)
    if not rows:
        raise InputError(f"no samples: the rate query and the CPU query share no pod and time over "
                         f"{rfc3339(src.start)}..{rfc3339(src.end)}; rate query: {t.rate_query} ; "
                         f"cpu query: {t.cpu_query}")
    source = f"prometheus:{src.url}"
    window = DataWindow(source=source, start=rfc3339(src.start), end=rfc3339(src.end), step=src.step_text)
    return Samples.from_rows(rows, source=source), window


def _write_report(res: Any, report_dir: str, seed: int) -> None:
    from ratefit.models.report import write_train_report

    write_train_report(res, report_dir, seed=seed)


def _train_one(job: _WorkerJob) -> ModelOutcome:
    """Train one key (in a worker process, or inline); never raises for the key's own errors."""
    t0 = time.perf_counter()
    t = job.task
    try:
        from ratefit.models.candidates import get_candidates
        from ratefit.models.store import ModelStore
        from ratefit.models.train import train_key_detailed

        samples, window = _samples_for(job)
        kwargs = dict(job.options)
        if job.estimators:
            kwargs["candidates"] = get_candidates(list(job.estimators))
        res = train_key_detailed(samples, key=t.model, window=window, **kwargs)
        path = ModelStore(job.store_dir).save(res.artifact)
        detail = t.why
        if job.report_dir:
            try:
                _write_report(res, job.report_dir, int(kwargs.get("seed", 0)))
            except Exception as exc:  # a plot problem never loses the model
                detail += f"; report not written: {_one_line(exc)}"
        return _outcome_from_artifact(t.model, t.policies, Result.TRAINED, res.artifact, detail=detail,
                                      seconds=time.perf_counter() - t0, path=str(path))
    except Exception as exc:
        return ModelOutcome(model=t.model, policies=t.policies, result=Result.FAILED,
                            detail=f"{type(exc).__name__}: {_one_line(exc)}", seconds=time.perf_counter() - t0)


def _worker_init() -> None:
    # one BLAS/OpenMP thread per worker: --jobs decides the parallelism (before numpy loads)
    for var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ.setdefault(var, "1")


class ProgressBar:
    """``train [#####-----] 3/6 shop/api/app trained (linear, 4.2 s)`` — one line per key."""

    def __init__(self, total: int, write: Progress, width: int = 20) -> None:
        self.total, self.write, self.width, self.done = total, write, width, 0

    def step(self, outcome: ModelOutcome) -> None:
        self.done += 1
        filled = self.width * self.done // max(1, self.total)
        what = (f"trained ({outcome.estimator}, {outcome.seconds:.1f} s)" if outcome.result is Result.TRAINED
                else f"FAILED: {outcome.detail[:160]}")
        self.write(f"train [{'#' * filled}{'-' * (self.width - filled)}] {self.done}/{self.total} "
                   f"{outcome.model} {what}")


def train_models(
    tasks: Sequence[ModelTask],
    *,
    source: PromSource | CsvSource,
    store_dir: str | os.PathLike[str],
    jobs: int = 1,
    options: Mapping[str, Any] | None = None,
    estimators: Sequence[str] | None = None,
    report_dir: str | os.PathLike[str] | None = None,
    progress: Progress | None = None,
) -> list[ModelOutcome]:
    """Train ``tasks`` (``jobs`` worker processes; 1: in this process) and return one
    outcome per task, in task order. ``options`` are ``models.train`` keyword options
    (folds, coverage, seed, tune, throttle_threshold, warmup…); ``estimators`` limits
    the candidates by name."""
    if jobs < 1:
        raise InputError(f"--jobs {jobs}: give at least 1")
    make = [
        _WorkerJob(task=t, source=source, store_dir=str(store_dir), options=tuple(sorted((options or {}).items())),
                   estimators=tuple(estimators) if estimators else None,
                   report_dir=str(report_dir) if report_dir else None)
        for t in tasks
    ]
    bar = ProgressBar(len(make), progress) if progress else None
    results: dict[str, ModelOutcome] = {}
    if jobs == 1 or len(make) <= 1:
        for job in make:
            out = _train_one(job)
            results[job.task.model] = out
            if bar:
                bar.step(out)
    else:
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor, as_completed
        from concurrent.futures.process import BrokenProcessPool

        ctx = multiprocessing.get_context("spawn")
        with ProcessPoolExecutor(max_workers=min(jobs, len(make)), mp_context=ctx,
                                 initializer=_worker_init) as pool:
            futures = {pool.submit(_train_one, job): job for job in make}
            for fut in as_completed(futures):
                job = futures[fut]
                try:
                    out = fut.result()
                except BrokenProcessPool as exc:
                    out = ModelOutcome(model=job.task.model, policies=job.task.policies, result=Result.FAILED,
                                       detail=f"the worker process died ({_one_line(exc)}); "
                                              "check its memory limit and retry")
                except Exception as exc:  # an unpicklable result or the like: still one row
                    out = ModelOutcome(model=job.task.model, policies=job.task.policies, result=Result.FAILED,
                                       detail=f"{type(exc).__name__}: {_one_line(exc)}")
                results[job.task.model] = out
                if bar:
                    bar.step(out)
    return [results[j.task.model] for j in make]


def train_from_policies(
    sources: Iterable[PolicySource],
    *,
    source: PromSource | CsvSource,
    store_dir: str | os.PathLike[str],
    max_age_s: float = 7 * 86400.0,
    now: float | None = None,
    jobs: int = 1,
    shard: tuple[int, int] | None = None,
    template: Any = None,
    interval: str | None = None,
    guard: Any = None,
    options: Mapping[str, Any] | None = None,
    estimators: Sequence[str] | None = None,
    report_dir: str | os.PathLike[str] | None = None,
    progress: Progress | None = None,
) -> TrainingSummary:
    """Plan, train, summarise (the whole of ``ratefit train --from-policies``)."""
    t0 = time.monotonic()
    plan = plan_training(sources, store_dir=store_dir, max_age_s=max_age_s,
                         now=time.time() if now is None else now, template=template, interval=interval,
                         guard=guard, shard=shard)
    if progress:
        where = f" (shard {shard[0]}/{shard[1]})" if shard else ""
        progress(f"train: {plan.models_named} models named by the policies{where}: {len(plan.tasks)} to train, "
                 f"{len(plan.up_to_date)} up to date, {len(plan.problems)} policy problems")
    trained = train_models(plan.tasks, source=source, store_dir=store_dir, jobs=jobs, options=options,
                           estimators=estimators, report_dir=report_dir, progress=progress)
    outcomes = sorted([*trained, *plan.up_to_date], key=lambda o: o.model)
    return TrainingSummary(outcomes=tuple(outcomes), problems=plan.problems, shard=shard,
                           seconds=time.monotonic() - t0)


# ---------------------------------------------------------------------------- output
def _m(v: float | None) -> str:
    return "-" if v is None else f"{v * 1000:.1f}m"


def _rows(summary: TrainingSummary) -> list[list[str]]:
    rows = []
    for o in summary.outcomes:
        if o.result is Result.FAILED:
            rows.append([o.model, "FAILED", "-", "-", "-", "-", "-", "-"])
            continue
        dropped = ", ".join(f"{k} {v}" for k, v in o.dropped) or "0"
        rng = "-" if o.rate_lo is None else f"{o.rate_lo:.3g}..{o.rate_hi:.3g} req/s"
        rows.append([o.model, o.result.value if o.result is Result.TRAINED else "up to date", o.estimator,
                     f"{o.samples_used}/{o.samples_total}", dropped, _m(o.cv_rmse), _m(o.baseline_rmse), rng])
    return rows


HEADER = ["MODEL", "RESULT", "ESTIMATOR", "SAMPLES USED/TOTAL", "DROPPED", "CV RMSE", "FIXED BASELINE RMSE",
          "TRAINED RATE RANGE"]


def _footer(summary: TrainingSummary) -> list[str]:
    lines = []
    for o in summary.outcomes:
        if o.result is Result.FAILED:
            lines.append(f"failed: {o.model}: {o.detail}")
    for p in summary.problems:
        lines.append(f"policy {p.policy}: {p.message}" + (f" ({p.origin})" if p.origin else ""))
    shard = f" in shard {summary.shard[0]}/{summary.shard[1]}" if summary.shard else ""
    lines.append(f"{summary.count(Result.TRAINED)} trained, {summary.count(Result.UP_TO_DATE)} up to date, "
                 f"{summary.count(Result.FAILED)} failed, {len(summary.problems)} policy problems{shard} "
                 f"in {summary.seconds:.1f} s")
    return lines


def render_summary(summary: TrainingSummary, fmt: str = "table") -> str:
    """The summary as ``table`` (aligned plain text), ``markdown`` or ``json``."""
    if fmt == "json":
        doc = {
            "ok": summary.ok,
            "shard": None if summary.shard is None else {"index": summary.shard[0], "count": summary.shard[1]},
            "counts": {r.value: summary.count(r) for r in Result} | {"policy_problems": len(summary.problems)},
            "models": [o.as_dict() for o in summary.outcomes],
            "problems": [{"policy": p.policy, "origin": p.origin, "model": p.model or None, "message": p.message}
                         for p in summary.problems],
            "seconds": round(summary.seconds, 3),
        }
        return json.dumps(doc, indent=2) + "\n"
    rows = _rows(summary)
    if fmt == "markdown":
        out = ["| " + " | ".join(HEADER) + " |", "|" + "---|" * len(HEADER)]
        out += ["| " + " | ".join(c.replace("|", "\\|") for c in r) + " |" for r in rows]
        return "\n".join(out) + "\n\n" + "".join(f"- {line}\n" for line in _footer(summary))
    if fmt != "table":
        raise InputError(f"--output {fmt!r}: choose table, json or markdown")
    widths = [max(len(r[i]) for r in [HEADER, *rows]) for i in range(len(HEADER))]
    out = ["  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip() for r in [HEADER, *rows]]
    return "\n".join(out) + "\n" + "".join(f"{line}\n" for line in _footer(summary))


def stderr_progress(line: str) -> None:
    print(line, file=sys.stderr, flush=True)

