"""Samples: what a demand curve is learned from, how they are read and cleaned.

A sample is one observation of one pod at one time: the request rate it served
(req/s) and the CPU it used (cores), optionally with the time, the pod name and
the share of CFS periods in which it was throttled (0..1).

Sources:

- a CSV file (``load_csv``): a header line with the columns ``rate,cpu`` and
  optionally ``timestamp`` (unix seconds, or RFC 3339 with an offset such as
  ``2026-01-05T10:00:00Z``), ``pod`` and ``throttled``; other columns are ignored.
  An empty cell, ``nan`` or ``NaN`` in ``rate``/``cpu``/``throttled`` is a missing
  value (Prometheus writes NaN for stale series) and is dropped by cleaning;
  anything else that is not a number, a negative rate or CPU, an infinite value,
  a row with the wrong number of fields, an empty file or a file without data rows
  stops with :class:`SampleFileError` naming the file, the line and the problem.
- the rows joined by ``ratefit.models.prometheus_samples.fetch_samples``
  (``Samples.from_rows``).

Cleaning (``clean``) drops, each sample counted once under the first reason that
applies, in this order:

1. ``missing``  — rate or CPU is NaN (a stale or absent series at that step);
2. ``duplicate`` — a second sample for the same pod and timestamp;
3. ``throttled`` — throttled share above the threshold (default 0.05): usage
   under a CPU limit is censored and under-states demand;
4. ``warmup``   — within the warm-up span (default 300 s) after a pod's first
   sample, or after a gap in its samples longer than the warm-up span (a restart
   under the same name); needs timestamps, skipped without them. Samples without
   a pod column are treated as one pod. A pod already running when the data window
   opens cannot be told from one starting then, so it loses its first warm-up span
   too (minutes out of a window of days).

and returns a :class:`CleanReport` (total, used, dropped by reason).
"""

from __future__ import annotations

import csv
import math
import os
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from datetime import datetime, timezone
from enum import StrEnum
from typing import Any

import numpy as np

from ratefit.models.errors import InputError, NotEnoughData, SampleFileError
from ratefit.models.sanity import check_sample

__all__ = [
    "Samples",
    "CleanReport",
    "DropReason",
    "load_csv",
    "clean",
    "parse_timestamp",
    "DEFAULT_THROTTLE_THRESHOLD",
    "DEFAULT_WARMUP_SECONDS",
    "MIN_SAMPLES",
    "REQUIRED_COLUMNS",
    "OPTIONAL_COLUMNS",
]

DEFAULT_THROTTLE_THRESHOLD = 0.05
DEFAULT_WARMUP_SECONDS = 300.0
#: fewest clean samples we learn from (5 folds of at least 4 points each, and a
#: conformal quantile that means something); common practice, no source
MIN_SAMPLES = 20
REQUIRED_COLUMNS = ("rate", "cpu")
OPTIONAL_COLUMNS = ("timestamp", "pod", "throttled")
_MISSING_TEXT = frozenset({"", "nan", "NaN", "NAN"})
_TRUE = frozenset({"true", "True", "TRUE"})
_FALSE = frozenset({"false", "False", "FALSE"})


class DropReason(StrEnum):
    MISSING = "missing"
    DUPLICATE = "duplicate"
    THROTTLED = "throttled"
    WARMUP = "warmup"


@dataclass(frozen=True, eq=False)
class Samples:
    """Parallel arrays: ``rate`` (req/s per pod), ``cpu`` (cores); optional
    ``timestamp`` (unix seconds), ``pod`` (names), ``throttled`` (share 0..1,
    NaN = unknown). ``source`` says where they came from (for messages)."""

    rate: np.ndarray
    cpu: np.ndarray
    timestamp: np.ndarray | None = None
    pod: np.ndarray | None = None
    throttled: np.ndarray | None = None
    source: str = "<samples>"

    def __post_init__(self) -> None:
        rate = np.asarray(self.rate, dtype=float).reshape(-1)
        cpu = np.asarray(self.cpu, dtype=float).reshape(-1)
        if rate.shape != cpu.shape:
            raise InputError(f"{self.source}: rate and cpu have different lengths ({rate.size} vs {cpu.size})")
        object.__setattr__(self, "rate", rate)
        object.__setattr__(self, "cpu", cpu)
        for name, dtype in (("timestamp", float), ("pod", object), ("throttled", float)):
            value = getattr(self, name)
            if value is None:
                continue
            arr = np.asarray(value, dtype=dtype).reshape(-1)
            if arr.size != rate.size:
                raise InputError(f"{self.source}: column {name!r} has {arr.size} values, rate has {rate.size}")
            object.__setattr__(self, name, arr)

    def __len__(self) -> int:
        return int(self.rate.size)

    def take(self, mask: np.ndarray) -> Samples:
        """The samples where ``mask`` (boolean or index array) selects."""
        pick = lambda a: None if a is None else a[mask]  # noqa: E731
        return Samples(
            rate=self.rate[mask],
            cpu=self.cpu[mask],
            timestamp=pick(self.timestamp),
            pod=pick(self.pod),
            throttled=pick(self.throttled),
            source=self.source,
        )

    def time_span(self) -> tuple[float, float] | None:
        """(first, last) timestamp in unix seconds, or None without timestamps."""
        if self.timestamp is None or self.timestamp.size == 0:
            return None
        return float(np.min(self.timestamp)), float(np.max(self.timestamp))

    @classmethod
    def from_rows(cls, rows: Iterable[Any], *, source: str = "prometheus") -> Samples:
        """Samples from joined rows ``(timestamp, pod, rate, cpu, throttled)`` —
        tuples or objects with those attributes (``fetch_samples`` output).
        ``throttled`` may be None (no throttle query)."""
        ts: list[float] = []
        pods: list[str] = []
        rates: list[float] = []
        cpus: list[float] = []
        thr: list[float] = []
        for row in rows:
            if hasattr(row, "rate"):
                t, p, r, c = row.timestamp, row.pod, row.rate, row.cpu
                h = getattr(row, "throttled", None)
            elif isinstance(row, Mapping):
                t, p, r, c, h = row["timestamp"], row["pod"], row["rate"], row["cpu"], row.get("throttled")
            else:
                t, p, r, c, h = row
            ts.append(_as_float(t))
            pods.append("" if p is None else str(p))
            rates.append(_as_float(r))
            cpus.append(_as_float(c))
            thr.append(math.nan if h is None else _as_float(h))
        return cls(
            rate=np.array(rates, dtype=float),
            cpu=np.array(cpus, dtype=float),
            timestamp=np.array(ts, dtype=float),
            pod=np.array(pods, dtype=object),
            throttled=np.array(thr, dtype=float),
            source=source,
        )


def _as_float(v: Any) -> float:
    if v is None:
        return math.nan
    if isinstance(v, datetime):
        return v.timestamp()
    return float(v)


@dataclass(frozen=True)
class CleanReport:
    """How many samples came in, how many were used, and why the rest were dropped."""

    total: int
    used: int
    dropped: dict[str, int] = field(default_factory=dict)

    def summary(self) -> str:
        parts = ", ".join(f"{n} {r}" for r, n in self.dropped.items() if n)
        return f"{self.used} of {self.total} samples used" + (f" (dropped {parts})" if parts else "")


# -- CSV ----------------------------------------------------------------------------


def parse_timestamp(text: str) -> float:
    """Unix seconds (``1767610800`` or ``1767610800.5``) or RFC 3339 with an offset
    (``2026-01-05T10:00:00Z``, ``…+01:00``) → unix seconds. ValueError otherwise."""
    s = text.strip()
    try:
        v = float(s)
    except ValueError:
        pass
    else:
        if not math.isfinite(v):
            raise ValueError(f"timestamp {text!r} is not finite")
        return v
    # RFC 3339 §5.6: date-time = full-date "T" full-time, with "Z" or a numeric offset;
    # it allows a space or lower-case t in place of "T" (RFC 3339 §5.6 NOTE).
    try:
        dt = datetime.fromisoformat(s.replace("z", "Z"))
    except ValueError:
        raise ValueError(
            f"timestamp {text!r} is neither unix seconds nor RFC 3339 (e.g. 2026-01-05T10:00:00Z)"
        ) from None
    if dt.tzinfo is None:
        raise ValueError(f"timestamp {text!r} has no time-zone offset: RFC 3339 needs 'Z' or '+hh:mm'")
    return dt.astimezone(timezone.utc).timestamp()


def _number(cell: str, column: str, *, allow_missing: bool) -> float:
    s = cell.strip()
    if s in _MISSING_TEXT:
        if allow_missing:
            return math.nan
        raise ValueError(f"{column}: missing value")
    try:
        v = float(s)
    except ValueError:
        raise ValueError(f"{column}: {cell!r} is not a number") from None
    if math.isnan(v):
        return math.nan
    if not math.isfinite(v):
        raise ValueError(f"{column}: {cell!r} is not a finite number")
    return v


def load_csv(path: str | os.PathLike[str]) -> Samples:
    """Read a samples CSV (see the module docstring); SampleFileError on bad input."""
    name = os.fspath(path)
    try:
        fh = open(name, newline="", encoding="utf-8-sig")
    except OSError as exc:
        raise SampleFileError(name, None, f"cannot read the file ({exc.strerror or exc})") from exc
    with fh:
        try:
            return _read(fh, name)
        except UnicodeDecodeError as exc:
            raise SampleFileError(name, None, f"not UTF-8 text ({exc.reason}); save the file as UTF-8 CSV") from exc
        except csv.Error as exc:
            raise SampleFileError(name, None, f"not a readable CSV file ({exc})") from exc


def _read(fh: Any, name: str) -> Samples:
    reader = csv.reader(fh)
    header: list[str] | None = None
    for row in reader:
        if any(c.strip() for c in row):
            header = [c.strip().lower() for c in row]
            break
    if header is None:
        raise SampleFileError(name, None, "the file is empty: expected a header line with the columns rate,cpu")
    hline = reader.line_num
    seen: set[str] = set()
    for col in header:
        if col in seen:
            raise SampleFileError(name, hline, f"column {col!r} appears twice in the header")
        seen.add(col)
    missing = [c for c in REQUIRED_COLUMNS if c not in header]
    if missing:
        raise SampleFileError(
            name,
            hline,
            f"missing column{'s' if len(missing) > 1 else ''} {', '.join(missing)}: the header must name "
            f"rate,cpu (optional: {','.join(OPTIONAL_COLUMNS)}), got {','.join(header)}",
        )
    idx = {c: header.index(c) for c in (*REQUIRED_COLUMNS, *OPTIONAL_COLUMNS) if c in header}
    width = len(header)
    rates: list[float] = []
    cpus: list[float] = []
    ts: list[float] | None = [] if "timestamp" in idx else None
    pods: list[str] | None = [] if "pod" in idx else None
    thr: list[float] | None = [] if "throttled" in idx else None
    for row in reader:
        line = reader.line_num
        if not any(c.strip() for c in row):
            continue
        if len(row) != width:
            raise SampleFileError(name, line, f"expected {width} fields (as in the header), got {len(row)}")
        try:
            r = _number(row[idx["rate"]], "rate", allow_missing=True)
            if r < 0:
                raise ValueError(f"rate: negative value {row[idx['rate']].strip()} (a request rate is >= 0 req/s)")
            c = _number(row[idx["cpu"]], "cpu", allow_missing=True)
            if c < 0:
                raise ValueError(f"cpu: negative value {row[idx['cpu']].strip()} (CPU usage is >= 0 cores)")
            check_sample(r, c)  # absurd values (1e17 cores, 1e12 req/s): models/sanity.py
            if ts is not None:
                cell = row[idx["timestamp"]]
                if not cell.strip():
                    raise ValueError("timestamp: missing value (unix seconds or RFC 3339)")
                ts.append(parse_timestamp(cell))
            if pods is not None:
                pods.append(row[idx["pod"]].strip())
            if thr is not None:
                cell = row[idx["throttled"]].strip()
                if cell in _TRUE:
                    h = 1.0
                elif cell in _FALSE:
                    h = 0.0
                else:
                    h = _number(cell, "throttled", allow_missing=True)
                if not math.isnan(h) and not 0.0 <= h <= 1.0:
                    raise ValueError(
                        f"throttled: {cell!r} is outside 0..1 (the share of CFS periods throttled)"
                    )
                thr.append(h)
        except ValueError as exc:
            raise SampleFileError(name, line, str(exc)) from None
        rates.append(r)
        cpus.append(c)
    if not rates:
        raise SampleFileError(name, hline, "no data rows after the header")
    return Samples(
        rate=np.array(rates),
        cpu=np.array(cpus),
        timestamp=None if ts is None else np.array(ts),
        pod=None if pods is None else np.array(pods, dtype=object),
        throttled=None if thr is None else np.array(thr),
        source=name,
    )


# -- cleaning -----------------------------------------------------------------------


def clean(
    samples: Samples,
    *,
    throttle_threshold: float = DEFAULT_THROTTLE_THRESHOLD,
    warmup: float = DEFAULT_WARMUP_SECONDS,
    min_samples: int = MIN_SAMPLES,
) -> tuple[Samples, CleanReport]:
    """Drop unusable samples (see the module docstring); NotEnoughData when fewer
    than ``min_samples`` remain or all remaining rates are equal."""
    if not 0.0 <= throttle_threshold <= 1.0:
        raise InputError(f"throttle threshold: {throttle_threshold!r} must be a share between 0 and 1")
    if not (math.isfinite(warmup) and warmup >= 0):
        raise InputError(f"warm-up: {warmup!r} must be a finite number of seconds >= 0")
    n = len(samples)
    reason = np.full(n, "", dtype=object)

    bad = ~(np.isfinite(samples.rate) & np.isfinite(samples.cpu))
    reason[bad] = DropReason.MISSING.value

    pods = samples.pod if samples.pod is not None else np.full(n, "", dtype=object)
    if samples.timestamp is not None:
        seen: set[tuple[str, float]] = set()
        ts = samples.timestamp
        for i in range(n):
            k = (pods[i], ts[i])
            if k in seen:
                if not reason[i]:
                    reason[i] = DropReason.DUPLICATE.value
            else:
                seen.add(k)

    if samples.throttled is not None:
        thr = samples.throttled
        over = np.isfinite(thr) & (thr > throttle_threshold)
        reason[over & (reason == "")] = DropReason.THROTTLED.value

    if samples.timestamp is not None and warmup > 0:
        warm = _in_warmup(samples.timestamp, pods, warmup)
        reason[warm & (reason == "")] = DropReason.WARMUP.value

    keep = reason == ""
    dropped = {r.value: int(np.count_nonzero(reason == r.value)) for r in DropReason}
    report = CleanReport(total=n, used=int(np.count_nonzero(keep)), dropped=dropped)
    out = samples.take(keep)
    if report.used < min_samples:
        raise NotEnoughData(
            f"{samples.source}: only {report.used} usable samples ({report.summary()}); "
            f"need at least {min_samples}: widen the window, or check the queries and the throttle threshold"
        )
    if float(np.ptp(out.rate)) <= 0.0:
        raise NotEnoughData(
            f"{samples.source}: every usable sample has the same rate ({out.rate[0]:g} req/s); "
            "a demand curve needs samples over a range of rates: widen the window"
        )
    return out, report


def _in_warmup(ts: np.ndarray, pods: np.ndarray, warmup: float) -> np.ndarray:
    """True where a sample lies within ``warmup`` s of its pod's (re)start: the pod's
    first sample, or the first sample after a gap longer than ``warmup``."""
    out = np.zeros(ts.size, dtype=bool)
    valid = np.isfinite(ts)
    groups: dict[str, list[int]] = {}
    for i, p in enumerate(pods.tolist()):
        if valid[i]:
            groups.setdefault(p, []).append(i)
    for idx_list in groups.values():
        idx = np.asarray(idx_list)
        order = idx[np.argsort(ts[idx], kind="stable")]
        t = ts[order]
        start = np.empty_like(t)
        gaps = np.diff(t) > warmup
        restart = np.concatenate([[True], gaps])
        # start time of the run each sample belongs to
        run_start_pos = np.maximum.accumulate(np.where(restart, np.arange(t.size), 0))
        start[:] = t[run_start_pos]
        out[order] = (t - start) < warmup
    return out
