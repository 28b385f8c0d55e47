"""`ratefit report` — write the Markdown page and PNG plot of a stored demand curve.

From the artifact alone the plot shows the chosen curve and its band; with
``--samples FILE.csv`` it also draws the (cleaned) samples, every candidate's curve
refitted on them, and the fixed allocation baseline. ``ratefit train --report DIR``
writes the full report straight after training.
"""

from __future__ import annotations

import argparse


HELP = """\
Write the Markdown page and PNG plot of a stored model into --out
(NAMESPACE__WORKLOAD__CONTAINER.md and .png). From the model alone the plot shows the chosen curve and its band;
with --samples FILE.csv it also draws the (cleaned) samples, every candidate
estimator's curve refitted on them, and the fixed allocation baseline.
ratefit train --report DIR writes the full report straight after training.
"""


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("report", help="write a Markdown page + PNG plot for a stored model",
                       description=HELP, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("key", metavar="NAMESPACE/WORKLOAD/CONTAINER", help="the model key (as in the SizingPolicy's model field)")
    p.add_argument("--store", required=True, metavar="DIR", help="model store directory")
    p.add_argument("--out", required=True, metavar="DIR", help="where to write NAMESPACE__WORKLOAD__CONTAINER.md and .png")
    p.add_argument("--samples", metavar="FILE.csv", help="the samples the model was trained on (adds the scatter)")
    p.set_defaults(handler=_run)


def _run(args: argparse.Namespace) -> int:
    from ratefit.models.keys import parse_key
    from ratefit.models.report import fit_all_for_report, write_report
    from ratefit.models.samples import clean, load_csv
    from ratefit.models.store import ModelStore

    from ratefit.controller.commands.store_dir import existing_store

    art = ModelStore(existing_store(args.store)).load(str(parse_key(args.key, field="model")))
    samples = ests = None
    if args.samples:
        samples, _ = clean(load_csv(args.samples))
        ests = fit_all_for_report(samples, seed=art.seed)
    md, png = write_report(art, args.out, samples=samples, estimators=ests)
    print(f"{art.key}: {md} {png}")
    return 0
