"""Samples: CSV loading (good and bad files), cleaning and its drop report."""

from __future__ import annotations

import math
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
import pytest

from ratefit.models.errors import NotEnoughData, SampleFileError
from ratefit.models.samples import CleanReport, Samples, clean, load_csv, parse_timestamp


def _write(tmp_path: Path, text: str, name: str = "s.csv") -> Path:
    p = tmp_path / name
    p.write_text(text, encoding="utf-8")
    return p


def _rows(n: int, *, start: float = 1_767_000_000, step: float = 30.0, pod: str = "web-1") -> str:
    return "".join(f"{start + i * step:.0f},{pod},{1 + i % 50},{0.1 + 0.01 * (i % 50):.4f},0\n" for i in range(n))


# -- loading ----------------------------------------------------------------------


def test_minimal_columns(tmp_path: Path) -> None:
    s = load_csv(_write(tmp_path, "rate,cpu\n1,0.1\n2.5,0.2\n"))
    assert s.rate.tolist() == [1.0, 2.5]
    assert s.cpu.tolist() == [0.1, 0.2]
    assert s.timestamp is None and s.pod is None and s.throttled is None


def test_all_columns_any_order_extra_ignored(tmp_path: Path) -> None:
    text = "pod,cpu,extra,throttled,timestamp,rate\nweb-1,0.5,x,0.25,1767610800,10\nweb-2,0.6,y,,2026-01-05T11:00:00Z,12\n"
    s = load_csv(_write(tmp_path, text))
    assert s.pod.tolist() == ["web-1", "web-2"]
    assert s.rate.tolist() == [10.0, 12.0]
    assert s.throttled[0] == 0.25 and math.isnan(s.throttled[1])
    # RFC 3339 "Z" is UTC (RFC 3339 §5.6); cross-checked with the standard library's own conversion
    assert s.timestamp[1] == datetime(2026, 1, 5, 11, 0, tzinfo=timezone.utc).timestamp()


def test_rfc3339_offsets() -> None:
    # RFC 3339 §5.6: "+01:00" is one hour ahead of UTC
    assert parse_timestamp("2026-01-05T12:00:00+01:00") == parse_timestamp("2026-01-05T11:00:00Z")
    assert parse_timestamp("2026-01-05T11:00:00.5Z") == parse_timestamp("1767610800.5")
    with pytest.raises(ValueError, match="time-zone offset"):
        parse_timestamp("2026-01-05T11:00:00")


def test_nan_values_are_missing_not_errors(tmp_path: Path) -> None:
    s = load_csv(_write(tmp_path, "rate,cpu\nNaN,0.1\n2,\n3,0.3\n"))
    assert np.isnan(s.rate[0]) and np.isnan(s.cpu[1]) and s.cpu[2] == 0.3


def test_bom_and_blank_lines(tmp_path: Path) -> None:
    p = tmp_path / "bom.csv"
    p.write_bytes("\ufeffrate,cpu\n\n1,0.1\n\n2,0.2\n".encode())
    assert load_csv(p).rate.tolist() == [1.0, 2.0]


BAD = [
    # (content, line, words in the problem)
    ("", None, "empty"),
    ("\n\n", None, "empty"),
    ("rate,cpu\n", 1, "no data rows"),
    ("rate,usage\n1,2\n", 1, "missing column cpu"),
    ("cpu\n1\n", 1, "missing column rate"),
    ("timestamp,pod\n1,a\n", 1, "missing columns rate, cpu"),
    ("rate,rate,cpu\n1,1,1\n", 1, "appears twice"),
    ("rate,cpu\n1,0.1\n-3,0.2\n", 3, "rate: negative value -3"),
    ("rate,cpu\n1,0.1\n3,-0.2\n", 3, "cpu: negative value"),
    ("rate,cpu\n1,0.1\nabc,0.2\n", 3, "rate: 'abc' is not a number"),
    ("rate,cpu\n1,0.1\n2,lots\n", 3, "cpu: 'lots' is not a number"),
    ("rate,cpu\n1,inf\n", 2, "not a finite number"),
    ("rate,cpu\n1,0.1\n2\n", 3, "expected 2 fields"),
    ("rate,cpu\n1,0.1,9\n", 2, "expected 2 fields"),
    ("rate,cpu,throttled\n1,0.1,1.5\n", 2, "throttled: '1.5' is outside 0..1"),
    ("rate,cpu,throttled\n1,0.1,much\n", 2, "throttled: 'much' is not a number"),
    ("rate,cpu,timestamp\n1,0.1,yesterday\n", 2, "neither unix seconds nor RFC 3339"),
    ("rate,cpu,timestamp\n1,0.1,2026-01-05T10:00:00\n", 2, "no time-zone offset"),
    ("rate,cpu,timestamp\n1,0.1,\n", 2, "timestamp: missing value"),
]


@pytest.mark.parametrize("content,line,words", BAD, ids=[b[2] for b in BAD])
def test_bad_csv_names_file_line_problem(tmp_path: Path, content: str, line: int | None, words: str) -> None:
    p = _write(tmp_path, content)
    with pytest.raises(SampleFileError) as info:
        load_csv(p)
    err = info.value
    assert err.path == str(p)
    assert err.line == line
    assert words in err.problem
    where = f"{p}:{line}" if line is not None else str(p)
    assert str(err).startswith(where + ": ")


def test_missing_file_and_binary(tmp_path: Path) -> None:
    with pytest.raises(SampleFileError, match="cannot read"):
        load_csv(tmp_path / "nope.csv")
    p = tmp_path / "bin.csv"
    p.write_bytes(b"rate,cpu\n\xff\xfe\x00,1\n")
    with pytest.raises(SampleFileError, match="UTF-8"):
        load_csv(p)


# -- cleaning ---------------------------------------------------------------------


def test_throttled_samples_dropped_and_counted(tmp_path: Path) -> None:
    # usage under a CPU limit is censored (Kubernetes docs, "Resource Management for Pods
    # and Containers": a container over its CPU limit is throttled), so those samples go
    n = 100
    thr = np.where(np.arange(n) % 4 == 0, 0.3, 0.0)
    thr[1] = 0.05  # exactly at the threshold: kept (the rule is "above")
    s = Samples(rate=np.arange(n, dtype=float), cpu=np.arange(n) * 0.01, throttled=thr)
    out, rep = clean(s)
    assert rep.dropped["throttled"] == 25
    assert rep.used == 75 == len(out)
    assert np.all(out.throttled <= 0.05)
    _, rep2 = clean(s, throttle_threshold=0.5)
    assert rep2.dropped["throttled"] == 0


def test_warmup_per_pod_and_after_restart_gap() -> None:
    t0 = 1_767_000_000.0
    ts = np.concatenate([t0 + 30 * np.arange(40), t0 + 600 + 30 * np.arange(40)])
    pods = np.array(["a"] * 40 + ["b"] * 40, dtype=object)
    ts[30:] += 0  # pod a: continuous
    s = Samples(rate=np.arange(80.0), cpu=np.ones(80), timestamp=ts, pod=pods)
    out, rep = clean(s, warmup=300)
    # each pod: samples at 0..270 s after its first one are warm-up (10 per pod)
    assert rep.dropped["warmup"] == 20
    # a gap longer than the warm-up span is a restart: another 10 dropped after it
    ts2 = ts.copy()
    ts2[20:40] += 1000
    _, rep2 = clean(Samples(rate=np.arange(80.0), cpu=np.ones(80), timestamp=ts2, pod=pods), warmup=300)
    assert rep2.dropped["warmup"] == 30
    _, rep3 = clean(s, warmup=0)
    assert rep3.dropped["warmup"] == 0


def test_missing_and_duplicates_counted_once(tmp_path: Path) -> None:
    text = "timestamp,pod,rate,cpu,throttled\n" + _rows(60) + "1767000000,web-1,5,0.2,0\n" + "1767009999,web-1,NaN,0.2,0.9\n"
    out, rep = clean(load_csv(_write(tmp_path, text)), warmup=0)
    assert rep == CleanReport(total=62, used=60, dropped={"missing": 1, "duplicate": 1, "throttled": 0, "warmup": 0})
    assert rep.used + sum(rep.dropped.values()) == rep.total


def test_not_enough_data() -> None:
    with pytest.raises(NotEnoughData, match="only 5 usable"):
        clean(Samples(rate=np.arange(5.0), cpu=np.ones(5)))
    with pytest.raises(NotEnoughData, match="same rate"):
        clean(Samples(rate=np.ones(50), cpu=np.ones(50)))


def test_from_rows_tuples_and_prometheus_rows() -> None:
    from ratefit.models.prometheus_samples import PromSample

    rows = [PromSample(1.0, "p", 2.0, 0.5, None), PromSample(31.0, "p", 3.0, 0.6, 0.1)]
    s = Samples.from_rows(rows)
    assert s.rate.tolist() == [2.0, 3.0] and s.pod.tolist() == ["p", "p"]
    assert math.isnan(s.throttled[0]) and s.throttled[1] == 0.1
    s2 = Samples.from_rows([(1.0, "p", 2.0, 0.5, None)])
    assert s2.cpu.tolist() == [0.5]


def test_scenario_csv_throttled_drop_matches_its_column(tmp_path: Path) -> None:
    from ratefit.models.scenario import write_csv

    paths = write_csv(tmp_path, hours=24, services=["route-planner"])
    (key, path), = [(k, p) for k, p in paths.items() if k == "parcels/route-planner/planner"]
    raw = load_csv(path)
    _, rep = clean(raw)
    # count straight from the file's own throttled column with numpy
    ok = np.isfinite(raw.rate) & np.isfinite(raw.cpu)
    expected = int(np.count_nonzero((raw.throttled > 0.05) & ok))
    assert expected > 0 and rep.dropped["throttled"] == expected
