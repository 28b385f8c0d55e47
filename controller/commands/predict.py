"""`ratefit predict` — look up a stored demand curve at a request rate.

    ratefit predict NAMESPACE/WORKLOAD/CONTAINER --rate R --store DIR [--output table|json|markdown]

Prints the demand and its upper bound (demand + band) in millicores, rounded up (1m is
Kubernetes' CPU precision), and whether the rate lies outside the trained range
(extrapolated). With --output json: {"model", "rate", "demand_m", "demand_bound_m",
"extrapolated", "version"} - the same fields as the sizing API's answer. The lookup is
the tabulated curve's, as the sizing API serves it.
"""

from __future__ import annotations

import argparse
import json
from typing import Any


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("predict", help="CPU demand (millicores) of a model at a request rate",
                       description=__doc__.split("\n\n", 1)[1], formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("model", nargs="?", metavar="NAMESPACE/WORKLOAD/CONTAINER",
                   help="the model key (as in the SizingPolicy's model field)")
    # the spelling before the positional key; hidden, kept for old scripts
    p.add_argument("--key", dest="key_option", metavar="NS/WORKLOAD/CONTAINER", help=argparse.SUPPRESS)
    p.add_argument("--store", required=True, metavar="DIR", help="model store directory")
    p.add_argument("--rate", required=True, type=float, help="request rate per pod (req/s)")
    p.add_argument("--output", choices=("table", "json", "markdown"), default="table",
                   help="output format (default table)")
    p.set_defaults(handler=_run)


def predict_dict(artifact: Any, rate: float) -> dict[str, Any]:
    """The answer for ``rate``: the sizing API's fields (``DemandOut``)."""
    from ratefit.models.curve import to_millicores

    demand, bound, extrap = artifact.demand_curve().lookup_one(rate)
    return {
        "model": artifact.key,
        "rate": rate,
        "demand_m": to_millicores(demand),
        "demand_bound_m": to_millicores(bound),
        "extrapolated": bool(extrap),
        "version": artifact.version,
    }


def _run(args: argparse.Namespace) -> int:
    from ratefit.models.errors import InputError
    from ratefit.models.keys import parse_key
    from ratefit.models.store import ModelStore

    given = args.model or args.key_option
    if not given:
        raise InputError("predict: give the model key NAMESPACE/WORKLOAD/CONTAINER (e.g. shop/checkout/app)")
    if args.model and args.key_option and args.model != args.key_option:
        raise InputError("predict: give the model key once (positional), not also with --key")
    from ratefit.controller.commands.store_dir import existing_store

    art = ModelStore(existing_store(args.store)).load(str(parse_key(given, field="model")))
    d = predict_dict(art, args.rate)
    if args.output == "json":
        print(json.dumps(d))
        return 0
    lo, hi = art.rate_range
    range_text = f"{lo:.4g}-{hi:.4g}"
    head = ("MODEL", "RATE (req/s)", "DEMAND", "DEMAND BOUND", "EXTRAPOLATED", "TRAINED RANGE (req/s)")
    row = (d["model"], f"{args.rate:g}", f"{d['demand_m']}m", f"{d['demand_bound_m']}m",
           "yes" if d["extrapolated"] else "no", range_text)
    if args.output == "markdown":
        print("| " + " | ".join(head) + " |")
        print("|" + "|".join(" --- " for _ in head) + "|")
        print("| " + " | ".join(row) + " |")
    else:
        widths = [max(len(h), len(c)) for h, c in zip(head, row)]
        for r in (head, row):
            print("  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip())
    if d["extrapolated"]:
        print(f"\nextrapolated: {args.rate:g} req/s lies outside the trained range {range_text} req/s "
              f"(coverage {art.coverage:g} holds only inside it)")
    return 0
