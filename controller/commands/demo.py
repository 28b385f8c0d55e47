"""`ratefit demo` — the whole flow on one machine with the INVENTED Kestrel Post scenario.
Thin: parse, call ``ratefit.controller.demo.run_demo``, print the review."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

HELP = """\
Run ratefit end to end on this machine with an INVENTED demo scenario (Kestrel Post,
a fictional parcel company): write its 7-day request/CPU history, backfill it into
the real Prometheus (if `prometheus` and `promtool` are installed; else replay the
history file — the output says which), train a demand model for every container,
start the sizing API (`ratefit serve`) and the sandbox API server (a local stand-in
for Kubernetes) loaded with the scenario's workloads, the SizingPolicy CRD and the
example policies, run one reconcile pass in dry-run, then a read-only pass at a
simulated time past the longest settle period (as if the rates stayed the same),
print both reviews, replay the week pass by pass (what the example policies would
have done: CPU-hours against today's requests and a fixed p95 request, shortfall,
rollouts, nodes; summary printed, plots in replay/), and stop everything it started
(also on Ctrl-C or an error).

Writes into --out: review.md, replay/ (plots and summary), reports/ (one training report + plot per model),
samples/ (the invented CSVs), kubeconfig, run/ (history, model store, logs).
The next demo with the same --out deletes run/ only if a demo created it (it holds
the marker file .ratefit-demo-run); any other run/ is refused with an error, and so is
an existing --out/kubeconfig that is not a sandbox kubeconfig.

Without Prometheus (or with --replay) the rates are replayed from the history file;
the output says so in one line. Neither root nor Prometheus is needed.
"""


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("demo", help="run the whole flow on an invented scenario and print the review",
                       description=HELP, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--out", default="demo-out", metavar="DIR", help="output directory (default %(default)s)")
    p.add_argument("--keep", action="store_true",
                   help="keep the sandbox, Prometheus and the sizing API running after the review until Ctrl-C")
    p.add_argument("--replay", action="store_true", help="replay the history file even when Prometheus is installed")
    p.add_argument("--hours", type=float, default=168.0, help="hours of invented history (default %(default)s: a week)")
    p.add_argument("--output", "-o", choices=("table", "json", "markdown"), default="table",
                   help="review format on stdout (default %(default)s)")
    p.set_defaults(handler=_run)


def _run(args: argparse.Namespace) -> int:
    import signal

    from ratefit.controller.demo import run_demo
    from ratefit.controller.review import render

    def on_term(signum: int, frame: object) -> None:
        raise KeyboardInterrupt  # unwinds run_demo, which stops everything it started

    signal.signal(signal.SIGTERM, on_term)

    res = run_demo(out=Path(args.out), keep=args.keep, hours=args.hours, use_prometheus=False if args.replay else None)
    later = res.simulated_at.strftime("%Y-%m-%d %H:%M:%SZ")
    if args.output == "json":
        import json

        sys.stdout.write(json.dumps({
            "now": [r.as_dict() for r in res.rows],
            "after_settle": {"simulated_at": later, "rows": [r.as_dict() for r in res.rows_after_settle]},
        }, indent=2) + "\n")
    else:
        head = "## " if args.output == "markdown" else ""
        sys.stdout.write(f"{head}Pass 1 — now (dry-run; status and Events written to the sandbox)\n\n")
        sys.stdout.write(render(res.rows, args.output))
        sys.stdout.write(f"\n{head}Pass 2 — simulated time {later}: after the longest settle, "
                         "as if the rates stayed the same (read only)\n\n")
        sys.stdout.write(render(res.rows_after_settle, args.output))
    print(f"ratefit demo: done in {res.seconds:.0f}s (rates from {res.rate_source}); review in {res.review_markdown}, "
          f"training reports in {res.out / 'reports'}; everything it started is stopped", file=sys.stderr)
    return 0
