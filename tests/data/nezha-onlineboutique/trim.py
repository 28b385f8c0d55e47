"""Regenerate the trimmed derivative in this directory from the shared copy of the
Nezha OnlineBoutique metrics (see SOURCE.md here for what is kept and why).

Run from the repository root:

    .venv/bin/python tests/data/nezha-onlineboutique/trim.py /work/shared/data/nezha-onlineboutique

For every ``<pod>_metric.csv`` it writes ``<pod>.csv`` with the columns
``timestamp,rate,cpu`` (RFC 3339 UTC from ``Time``; ``PodWorkload(Ops)`` unchanged
as req/s; ``CpuUsage(m)`` / 1000 as cores) and leaves out every row from 60 s before
to 360 s after any fault injection in ``fault_list.json`` (in every pod's file:
a fault in one service reaches its callers). Standard library only.
"""

from __future__ import annotations

import csv
import json
import sys
from datetime import datetime, timezone
from pathlib import Path

#: the fault window SOURCE.md of the shared copy prescribes (seconds around each injection)
BEFORE, AFTER = 60, 360
HERE = Path(__file__).resolve().parent


def parse_time(text: str) -> datetime:
    """'2022-08-22 03:51:19.799087274 +0000 UTC m=+0.305041286' -> aware datetime (µs kept)."""
    day, clock, offset = text.split()[:3]
    if offset != "+0000":
        raise ValueError(f"unexpected offset {offset!r} in {text!r}")
    whole, _, frac = clock.partition(".")
    return datetime.strptime(f"{day} {whole}.{(frac + '000000')[:6]}", "%Y-%m-%d %H:%M:%S.%f").replace(
        tzinfo=timezone.utc
    )


def fault_windows(src: Path) -> list[tuple[float, float]]:
    faults = json.loads((src / "fault_list.json").read_text())
    return sorted(
        (int(f["inject_timestamp"]) - BEFORE, int(f["inject_timestamp"]) + AFTER)
        for hour in faults.values()
        for f in hour
    )


def trim(src: Path, out: Path = HERE) -> dict[str, tuple[int, int]]:
    windows = fault_windows(src)
    counts: dict[str, tuple[int, int]] = {}
    for path in sorted(src.glob("*_metric.csv")):
        pod = path.name.removesuffix("_metric.csv")
        rows = []
        total = 0
        with path.open(newline="") as fh:
            for rec in csv.DictReader(fh):
                total += 1
                t = parse_time(rec["Time"])
                ts = t.timestamp()
                if any(lo <= ts <= hi for lo, hi in windows):
                    continue
                cores = float(rec["CpuUsage(m)"]) / 1000.0
                rows.append((t.strftime("%Y-%m-%dT%H:%M:%S.%fZ"), rec["PodWorkload(Ops)"], repr(cores)))
        with (out / f"{pod}.csv").open("w", newline="") as fh:
            w = csv.writer(fh, lineterminator="\n")
            w.writerow(["timestamp", "rate", "cpu"])
            w.writerows(rows)
        counts[pod] = (total, len(rows))
    return counts


if __name__ == "__main__":
    if len(sys.argv) != 2:
        sys.exit("usage: trim.py SHARED_NEZHA_DIR (the directory holding *_metric.csv and fault_list.json)")
    for pod, (total, kept) in trim(Path(sys.argv[1])).items():
        print(f"{pod}: kept {kept} of {total} rows")
