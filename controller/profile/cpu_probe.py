"""Where the target's CPU comes from: a process tree in /proc, a cgroup, or Prometheus.

Every probe answers one question: how many cores did the target use in each of a
list of time windows. Local probes read a cumulative CPU-seconds counter at every
window boundary (:meth:`CpuProbe.read`, cheap, called on the load generator's
clock) and divide the differences by the elapsed time; the Prometheus probe reads
nothing during the load and asks Prometheus afterwards.

- ``pid:N[,M…]`` — CPU time of each process and all its live descendants. Children
  are found by their parent pid (field 4 of ``/proc/<pid>/stat``) at every read, so an
  nginx master given as N brings its workers. Each thread's time on the CPU comes from
  ``/proc/<pid>/task/<tid>/schedstat`` (first field, nanoseconds; the kernel's
  "scheduler statistics" docs) when the kernel has it, else from ``utime + stime``
  (fields 14 and 15 of ``/proc/<pid>/stat``, whole clock ticks of ``SC_CLK_TCK``,
  10 ms; proc(5)) — ticks are too coarse for windows of a second or two. A thread or
  process that exits keeps its last figure in the sum (the counter never goes back);
  nothing is read from a parent's ``cutime``, so nothing counts twice.
- ``cgroup:PATH`` — cgroup v2 ``cpu.stat`` (``usage_usec``; ``nr_periods`` and
  ``nr_throttled`` give the throttled share; Linux docs, "Control Group v2") or,
  on a cgroup v1 ``cpuacct`` directory, ``cpuacct.usage`` (nanoseconds). A relative
  PATH is looked up under /sys/fs/cgroup.
- ``prometheus:QUERY`` — QUERY must answer cores (one series, or several that are
  summed), e.g. ``sum(rate(container_cpu_usage_seconds_total{namespace="staging",
  pod=~"shop-.*",container!=""}[1m]))``. It is evaluated with ``query_range`` at
  the end of every window; keep the rate() range no longer than the warm-up so
  the previous step does not leak into the measured window.
"""

from __future__ import annotations

import math
import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Protocol

from ratefit.models.errors import InputError, RatefitError

__all__ = [
    "CpuReading",
    "CpuProbe",
    "ProcTreeProbe",
    "CgroupProbe",
    "PrometheusProbe",
    "ProbeError",
    "parse_cpu_from",
    "CGROUP_ROOT",
]

CGROUP_ROOT = Path("/sys/fs/cgroup")


class ProbeError(RatefitError):
    """The CPU source cannot be read; the message says which and what to check."""


@dataclass(frozen=True, slots=True)
class CpuReading:
    """A counter read at ``wall`` (unix seconds) and ``mono`` (loop clock):
    cumulative CPU seconds, and cumulative CFS periods / throttled periods when known."""

    wall: float
    mono: float
    cpu_seconds: float = math.nan
    periods: int | None = None
    throttled: int | None = None


class CpuProbe(Protocol):
    description: str

    def read(self, *, wall: float, mono: float) -> CpuReading: ...

    def cores(self, readings: Sequence[CpuReading]) -> list[float]:
        """Cores used between consecutive readings (len(readings) - 1 values)."""
        ...

    def throttled_shares(self, readings: Sequence[CpuReading]) -> list[float] | None:
        """Share of CFS periods throttled between consecutive readings, or None."""
        ...


def _counter_cores(readings: Sequence[CpuReading]) -> list[float]:
    out = []
    for a, b in zip(readings, readings[1:]):
        dt = b.mono - a.mono
        out.append(max(0.0, b.cpu_seconds - a.cpu_seconds) / dt if dt > 0 else math.nan)
    return out


class ProcTreeProbe:
    """CPU of processes and their descendants from /proc (see the module docstring)."""

    def __init__(self, pids: Sequence[int], *, proc: Path = Path("/proc")) -> None:
        if not pids:
            raise InputError("--cpu-from pid:N needs at least one process id")
        self.proc = proc
        self.roots = tuple(int(p) for p in pids)
        self.tick = float(os.sysconf("SC_CLK_TCK"))
        self._seen: dict[tuple[int, int], float] = {}  # (pid, starttime) -> CPU seconds (ticks)
        self._threads: dict[tuple[int, int, int], float] = {}  # (pid, starttime, tid) -> seconds
        self.precise = (proc / str(self.roots[0]) / "schedstat").is_file()
        for pid in self.roots:
            if self._stat(pid) is None:
                raise ProbeError(
                    f"--cpu-from pid:{pid}: no such process; give the PID of the running server "
                    "(its master process brings its workers)"
                )
        self.description = "pid:" + ",".join(map(str, self.roots))

    def _stat(self, pid: int) -> tuple[int, int, int] | None:
        """(ppid, starttime, utime+stime) of ``pid`` or None when it is gone."""
        try:
            text = (self.proc / str(pid) / "stat").read_text()
        except (FileNotFoundError, ProcessLookupError, PermissionError):
            return None
        # the command name (field 2) is in parentheses and may hold spaces or ')'
        rest = text[text.rindex(")") + 2 :].split()
        # rest[0] is field 3 (state): field k is rest[k - 3]
        return int(rest[1]), int(rest[19]), int(rest[11]) + int(rest[12])

    def _tree(self) -> dict[int, tuple[int, int]]:
        table: dict[int, tuple[int, int, int]] = {}
        for entry in os.scandir(self.proc):
            if entry.name.isdigit():
                st = self._stat(int(entry.name))
                if st is not None:
                    table[int(entry.name)] = st
        children: dict[int, list[int]] = {}
        for pid, (ppid, _, _) in table.items():
            children.setdefault(ppid, []).append(pid)
        out: dict[int, tuple[int, int]] = {}
        todo = [p for p in self.roots if p in table]
        while todo:
            pid = todo.pop()
            if pid in out:
                continue
            out[pid] = (table[pid][1], table[pid][2])
            todo.extend(children.get(pid, ()))
        return out

    def _thread_seconds(self, pid: int) -> dict[int, float] | None:
        """CPU seconds per live thread of ``pid`` from schedstat, or None when unreadable."""
        out: dict[int, float] = {}
        try:
            tids = [e.name for e in os.scandir(self.proc / str(pid) / "task") if e.name.isdigit()]
        except OSError:
            return None
        for tid in tids:
            try:
                ns = (self.proc / str(pid) / "task" / tid / "schedstat").read_text().split()[0]
            except (OSError, IndexError):
                continue  # the thread just ended
            out[int(tid)] = int(ns) / 1e9
        return out

    def read(self, *, wall: float, mono: float) -> CpuReading:
        for pid, (start, ticks) in self._tree().items():
            self._seen[(pid, start)] = ticks / self.tick
            if self.precise:
                threads = self._thread_seconds(pid)
                if threads is not None:
                    for tid, sec in threads.items():
                        self._threads[(pid, start, tid)] = sec
        total = sum(self._threads.values()) if self.precise else sum(self._seen.values())
        return CpuReading(wall=wall, mono=mono, cpu_seconds=total)

    def pids(self) -> list[int]:
        """The live processes counted now (roots and descendants)."""
        return sorted(self._tree())

    cores = staticmethod(_counter_cores)

    def throttled_shares(self, readings: Sequence[CpuReading]) -> list[float] | None:
        return None


class CgroupProbe:
    """CPU of a cgroup: v2 ``cpu.stat`` or v1 ``cpuacct.usage`` (see the module docstring)."""

    def __init__(self, path: str | os.PathLike[str], *, root: Path = CGROUP_ROOT) -> None:
        p = Path(path)
        if not p.is_absolute():
            p = root / p
        if not p.is_dir():
            raise ProbeError(
                f"--cpu-from cgroup:{path}: no such cgroup directory ({p}); give the directory that "
                "holds cpu.stat, e.g. /sys/fs/cgroup/system.slice/nginx.service"
            )
        if (p / "cpu.stat").is_file() and "usage_usec" in self._stat(p / "cpu.stat"):
            self.version = 2
        elif (p / "cpuacct.usage").is_file():
            self.version = 1
        else:
            raise ProbeError(
                f"--cpu-from cgroup:{path}: {p} has neither cpu.stat with usage_usec (cgroup v2) "
                "nor cpuacct.usage (cgroup v1)"
            )
        self.path = p
        self.description = f"cgroup:{p}"

    @staticmethod
    def _stat(file: Path) -> dict[str, int]:
        try:
            lines = file.read_text().splitlines()
        except OSError as exc:
            raise ProbeError(f"cannot read {file}: {exc.strerror or exc}") from exc
        out = {}
        for line in lines:
            k, _, v = line.partition(" ")
            if v.strip().isdigit():
                out[k] = int(v)
        return out

    def read(self, *, wall: float, mono: float) -> CpuReading:
        if self.version == 2:
            st = self._stat(self.path / "cpu.stat")
            return CpuReading(
                wall=wall,
                mono=mono,
                cpu_seconds=st["usage_usec"] / 1e6,
                periods=st.get("nr_periods"),
                throttled=st.get("nr_throttled"),
            )
        try:
            ns = int((self.path / "cpuacct.usage").read_text().strip())
        except (OSError, ValueError) as exc:
            raise ProbeError(f"cannot read {self.path / 'cpuacct.usage'}: {exc}") from exc
        return CpuReading(wall=wall, mono=mono, cpu_seconds=ns / 1e9)

    cores = staticmethod(_counter_cores)

    def throttled_shares(self, readings: Sequence[CpuReading]) -> list[float] | None:
        if any(r.periods is None or r.throttled is None for r in readings):
            return None
        out = []
        for a, b in zip(readings, readings[1:]):
            dp = b.periods - a.periods  # type: ignore[operator]
            dt = b.throttled - a.throttled  # type: ignore[operator]
            out.append(dt / dp if dp > 0 else 0.0)
        return out


class PrometheusProbe:
    """Cores from a PromQL query evaluated at each window end (see the module docstring).

    ``client`` is a :class:`ratefit.models.prometheus.PrometheusClient` (passed in;
    its lifetime is the caller's)."""

    def __init__(self, client, query: str) -> None:  # noqa: ANN001 - PrometheusClient
        if not query.strip():
            raise InputError("--cpu-from prometheus:QUERY needs a PromQL query that answers cores")
        self.client = client
        self.query = query
        self.description = f"prometheus:{query}"

    def read(self, *, wall: float, mono: float) -> CpuReading:
        return CpuReading(wall=wall, mono=mono)

    def cores(self, readings: Sequence[CpuReading]) -> list[float]:
        if len(readings) < 2:
            return []
        ends = [r.wall for r in readings[1:]]
        step = max(0.001, min(b - a for a, b in zip(ends, ends[1:])) if len(ends) > 1 else 1.0)
        series = self.client.query_range(self.query, start=ends[0], end=ends[-1] + step / 2, step=step)
        if not series:
            raise ProbeError(
                f"Prometheus answered no series for {self.query!r}; check the labels (try it in the "
                "Prometheus UI) and that the target is scraped"
            )
        out = []
        for t in ends:
            total = 0.0
            found = False
            for s in series:
                if len(s) == 0:
                    continue
                i = int(abs(s.timestamps - t).argmin())
                if abs(float(s.timestamps[i]) - t) <= step and math.isfinite(float(s.values[i])):
                    total += float(s.values[i])
                    found = True
            out.append(total if found else math.nan)
        return out

    def throttled_shares(self, readings: Sequence[CpuReading]) -> list[float] | None:
        return None


def parse_cpu_from(text: str, *, prometheus_url: str | None = None, timeout: float = 10.0):
    """A probe for ``--cpu-from``; the caller closes ``probe.client`` for Prometheus."""
    kind, sep, arg = text.partition(":")
    if not sep or not arg.strip():
        raise InputError(
            f"--cpu-from {text!r}: write pid:N (one or more PIDs, comma-separated), cgroup:PATH or prometheus:QUERY"
        )
    if kind == "pid":
        try:
            pids = [int(p) for p in arg.split(",")]
        except ValueError:
            raise InputError(f"--cpu-from {text!r}: pid:N takes process ids, e.g. pid:1234 or pid:1234,1240") from None
        if any(p <= 0 for p in pids):
            raise InputError(f"--cpu-from {text!r}: process ids are positive")
        return ProcTreeProbe(pids)
    if kind == "cgroup":
        return CgroupProbe(arg)
    if kind == "prometheus":
        if not prometheus_url:
            raise InputError("--cpu-from prometheus:QUERY needs --prometheus URL (e.g. http://prometheus:9090)")
        from ratefit.models.prometheus import PrometheusClient

        return PrometheusProbe(PrometheusClient(prometheus_url, timeout=timeout), arg)
    raise InputError(f"--cpu-from {text!r}: unknown source {kind!r}; use pid:N, cgroup:PATH or prometheus:QUERY")
