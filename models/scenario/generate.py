"""Simulated per-pod history of the INVENTED Kestrel Post demo scenario.

INVENTED DATA. For every service the simulation draws, on one time grid of ``step_s``:

* the workload's total request rate from its daily profile, with noise, shared by its
  pods with a small fixed imbalance and per-step noise;
* per pod and container the CPU demand from the container's true curve, with the pod's
  own base/slope (a few percent off), multiplicative and additive noise, and a warm-up
  surcharge for pods that start inside the history (``warmup_cores`` fading to 0 over
  ``warmup_s``); pod 0 of each Deployment is replaced at ``restart_at`` of the history;
* for containers with a CPU limit: usage capped at the limit, and the throttled share of
  CFS periods, rising from 0 at 90% of the limit to 25% at the limit and beyond (a model,
  common practice no source: bursts are throttled before the mean reaches the limit).

A sample at time t describes the step (t − step_s, t]: mean req/s, mean cores, throttled
fraction. All draws come from ``numpy.random.default_rng((seed, service index))``, so a
service's data does not depend on which other services are generated.
"""

from __future__ import annotations

import csv
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterable, NamedTuple, Sequence

import numpy as np

from ratefit.models.scenario.services import SCENARIO, ORGANISATION, Service

__all__ = [
    "DEFAULT_END",
    "SampleRow",
    "PodTrack",
    "simulate",
    "generate_samples",
    "write_csv",
    "select_services",
    "csv_name",
]

#: Default end of generated histories: 2026-01-01T00:00:00Z (fixed, for reproducible CSVs).
DEFAULT_END = 1_767_225_600.0
_ALPHABET = np.array(list("bcdfghjklmnpqrstvwxz2456789"))
CFS_PERIODS_PER_SECOND = 10  # 100 ms CFS period (Kubernetes default; see DESIGN.md cgroups)


class SampleRow(NamedTuple):
    """One sample of one container of one pod (INVENTED data)."""

    key: str
    namespace: str
    workload: str
    container: str
    pod: str
    timestamp: float
    rate: float  # req/s served by the pod over the step
    cpu: float  # cores used by the container over the step
    throttled: float  # throttled CFS periods / CFS periods over the step (0 without a limit)


@dataclass(frozen=True)
class PodTrack:
    """One pod's life inside the history: index range on the grid and its series."""

    service: Service
    pod: str
    first: int  # first grid index with a sample
    stop: int  # one past the last grid index
    started_inside: bool  # True if the pod started within the history (warm-up shown)
    timestamps: np.ndarray = field(repr=False)
    rate: np.ndarray = field(repr=False)
    cpu: dict[str, np.ndarray] = field(repr=False)
    throttled: dict[str, np.ndarray] = field(repr=False)
    request_offset: float = 0.0  # counter value before the history (pods already running)
    cpu_offset: dict[str, float] = field(default_factory=dict, repr=False)


def select_services(services: Iterable[Service | str] | None) -> list[tuple[int, Service]]:
    """The chosen services with their scenario index (keys ``ns/workload[/c]`` or names allowed)."""
    if services is None:
        return list(enumerate(SCENARIO))
    out = []
    for s in services:
        if isinstance(s, str):
            parts = s.split("/")
            matches = [
                (i, x) for i, x in enumerate(SCENARIO)
                if (len(parts) == 1 and x.workload == parts[0]) or parts[:2] == [x.namespace, x.workload]
            ]
            if not matches:
                raise KeyError(f"no service {s!r} in the invented Kestrel Post scenario")
            out.extend(matches)
        else:
            out.append((SCENARIO.index(s) if s in SCENARIO else len(SCENARIO) + len(out), s))
    return out


def _grid(end: float, hours: float, step_s: float) -> np.ndarray:
    n = int(round(hours * 3600.0 / step_s))
    if n < 2:
        raise ValueError(f"history of {hours} h at step {step_s} s has fewer than 2 samples")
    end = float(np.floor(end / step_s) * step_s)  # align to the step: eval times line up with samples
    return end - step_s * np.arange(n - 1, -1, -1, dtype=float)


def _pod_name(service: Service, rng: np.random.Generator, i: int, template_hash: str) -> str:
    if service.kind == "StatefulSet":
        return f"{service.workload}-{i}"
    return f"{service.workload}-{template_hash}-{''.join(rng.choice(_ALPHABET, 5))}"


def simulate(
    *,
    seed: int = 0,
    hours: float = 48,
    step_s: float = 30,
    end: float | None = None,
    services: Iterable[Service | str] | None = None,
) -> list[PodTrack]:
    """Per-pod series for the chosen services on one grid ending at ``end`` (aligned down to the step)."""
    t = _grid(DEFAULT_END if end is None else end, hours, step_s)
    n = t.shape[0]
    tracks: list[PodTrack] = []
    for idx, svc in select_services(services):
        rng = np.random.default_rng((seed, idx))
        prof = svc.rate_profile
        total = prof.total(t) * np.clip(1.0 + prof.noise * rng.standard_normal(n), 0.5, 1.5)
        shares = 1.0 + prof.imbalance * rng.standard_normal(svc.replicas)
        shares = np.clip(shares / shares.mean(), 0.5, 1.5)
        template_hash = "".join(rng.choice(_ALPHABET, 9))
        pods: list[tuple[str, int, int, bool, float]] = []  # name, first, stop, started_inside, share
        for i in range(svc.replicas):
            name = _pod_name(svc, rng, i, template_hash)
            if i == 0 and svc.kind == "Deployment" and svc.restart_at is not None:
                r = int(svc.restart_at * n)
                pods.append((name, 0, r, False, shares[i]))
                pods.append((_pod_name(svc, rng, i, template_hash), r, n, True, shares[i]))
            else:
                pods.append((name, 0, n, False, shares[i]))
        for name, first, stop, inside, share in pods:
            m = stop - first
            ts = t[first:stop]
            rate = total[first:stop] / svc.replicas * share * np.clip(1.0 + 0.03 * rng.standard_normal(m), 0.7, 1.3)
            age = ts - (ts[0] - step_s) if inside else np.full(m, np.inf)
            cpu: dict[str, np.ndarray] = {}
            thr: dict[str, np.ndarray] = {}
            offs: dict[str, float] = {}
            for c in svc.containers:
                truth = c.truth.for_pod(rng)
                demand = truth(rate)
                if c is svc.containers[0]:  # the main container warms up (JIT, caches); sidecars do not
                    demand = demand + svc.warmup_cores * np.clip(1.0 - age / svc.warmup_s, 0.0, 1.0)
                demand = demand * (1.0 + 0.03 * rng.standard_normal(m)) + 0.002 * rng.standard_normal(m)
                demand = np.maximum(demand, 0.001)
                if c.limit_m is not None:
                    lim = c.limit_m / 1000.0
                    thr[c.name] = np.clip((demand / lim - 0.9) * 2.5, 0.0, 1.0)
                    cpu[c.name] = np.minimum(demand, lim)
                else:
                    thr[c.name] = np.zeros(m)
                    cpu[c.name] = demand
                offs[c.name] = 0.0 if inside else float(rng.uniform(500.0, 20_000.0))
            tracks.append(
                PodTrack(
                    service=svc, pod=name, first=first, stop=stop, started_inside=inside,
                    timestamps=ts, rate=rate, cpu=cpu, throttled=thr,
                    request_offset=0.0 if inside else float(rng.uniform(1e5, 5e6)), cpu_offset=offs,
                )
            )
    return tracks


def generate_samples(
    *,
    seed: int = 0,
    hours: float = 48,
    step_s: float = 30,
    services: Iterable[Service | str] | None = None,
    end: float | None = None,
) -> list[SampleRow]:
    """All samples of the INVENTED scenario: one row per container, pod and timestamp."""
    rows: list[SampleRow] = []
    for tr in simulate(seed=seed, hours=hours, step_s=step_s, end=end, services=services):
        svc = tr.service
        for c in svc.containers:
            key = f"{svc.namespace}/{svc.workload}/{c.name}"
            rows.extend(
                SampleRow(key, svc.namespace, svc.workload, c.name, tr.pod, float(ts), float(r), float(u), float(h))
                for ts, r, u, h in zip(tr.timestamps, tr.rate, tr.cpu[c.name], tr.throttled[c.name])
            )
    return rows


def csv_name(key: str) -> str:
    """File name of a key's samples: ``parcels/label-printer/app`` → ``parcels__label-printer__app.csv``."""
    return key.replace("/", "__") + ".csv"


def write_csv(
    directory: str | os.PathLike[str],
    *,
    seed: int = 0,
    hours: float = 48,
    step_s: float = 30,
    services: Sequence[Service | str] | None = None,
    end: float | None = None,
) -> dict[str, Path]:
    """One CSV per key (columns ``timestamp,pod,rate,cpu,throttled``) plus a README saying the
    data is invented. Returns ``{key: path}``."""
    d = Path(directory)
    d.mkdir(parents=True, exist_ok=True)
    by_key: dict[str, list[SampleRow]] = {}
    for row in generate_samples(seed=seed, hours=hours, step_s=step_s, services=services, end=end):
        by_key.setdefault(row.key, []).append(row)
    out: dict[str, Path] = {}
    for key, rows in by_key.items():
        rows.sort(key=lambda r: (r.timestamp, r.pod))
        p = d / csv_name(key)
        with open(p, "w", newline="") as f:
            w = csv.writer(f)
            w.writerow(["timestamp", "pod", "rate", "cpu", "throttled"])
            for r in rows:
                w.writerow([f"{r.timestamp:.0f}", r.pod, f"{r.rate:.6f}", f"{r.cpu:.6f}", f"{r.throttled:.4f}"])
        out[key] = p
    (d / "README.txt").write_text(
        f"INVENTED DEMO DATA — {ORGANISATION}.\n"
        "Kestrel Post is a fictional parcel company made up for ratefit's demo and tests.\n"
        f"Generated by ratefit.models.scenario (seed={seed}, hours={hours}, step_s={step_s}).\n"
        "Columns: timestamp (unix s, end of the step), pod, rate (req/s), cpu (cores), "
        "throttled (throttled CFS periods / periods).\n"
    )
    return out
