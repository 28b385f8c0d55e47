"""``python -m ratefit.models.scenario DIR`` — write the INVENTED Kestrel Post scenario to DIR.

Writes ``DIR/samples/*.csv`` (one per key), ``DIR/history.om`` (OpenMetrics, ending
``--end-ago`` before now, for ``promtool tsdb create-blocks-from openmetrics``) and
``DIR/manifests/*.yaml``. Everything written is invented demo data.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

from ratefit.models.durations import parse_duration
from ratefit.models.scenario import ORGANISATION, write_csv, write_manifests, write_openmetrics


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(
        prog="python -m ratefit.models.scenario",
        description=f"Write the {ORGANISATION}: CSV samples, OpenMetrics history and manifests.",
    )
    p.add_argument("dir", type=Path, help="output directory (created)")
    p.add_argument("--hours", type=float, default=48, help="length of the history (default 48)")
    p.add_argument("--step", default="30s", help="sample spacing, a Prometheus duration (default 30s)")
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    p.add_argument("--end-ago", default="5m", help="the history ends this long before now (default 5m)")
    a = p.parse_args(argv)
    step = parse_duration(a.step, field="--step")
    end = time.time() - parse_duration(a.end_ago, field="--end-ago")
    print(f"writing {ORGANISATION} to {a.dir} …", file=sys.stderr)
    csvs = write_csv(a.dir / "samples", seed=a.seed, hours=a.hours, step_s=step, end=end)
    info = write_openmetrics(a.dir / "history.om", end=end, hours=a.hours, step_s=step, seed=a.seed)
    mans = write_manifests(a.dir / "manifests")
    print(f"{len(csvs)} CSV files, {info.series} series / {info.samples} samples in {info.path} "
          f"(end {info.end:.0f}), {len(mans)} manifest files", file=sys.stderr)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
