"""`ratefit predict` — look up a stored demand curve at a request rate.

Prints ``{"cpu_m": int, "upper_m": int, "extrapolated": bool, "key": …, "rate": …}``
with ``--output json``: demand and upper bound (demand + band) in millicores,
rounded up (1m is Kubernetes' CPU precision); ``extrapolated`` is true outside the
trained rate range. The lookup is the tabulated curve's, as the sizing API serves it.
"""

from __future__ import annotations

import argparse
import json


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("predict", help="CPU demand (millicores) of a key at a request rate",
                       description=__doc__.split("\n\n", 1)[1], formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--store", required=True, metavar="DIR", help="model store directory")
    p.add_argument("--key", required=True, metavar="NS/WORKLOAD/CONTAINER")
    p.add_argument("--rate", required=True, type=float, help="request rate per pod (req/s)")
    p.add_argument("--output", choices=("text", "json"), default="text", help="output format (default text)")
    p.set_defaults(handler=_run)


def predict_dict(artifact, rate: float) -> dict:
    from ratefit.models.curve import to_millicores

    demand, upper, extrap = artifact.demand_curve().lookup_one(rate)
    return {
        "cpu_m": to_millicores(demand),
        "upper_m": to_millicores(upper),
        "extrapolated": bool(extrap),
        "key": artifact.key,
        "rate": rate,
    }


def _run(args: argparse.Namespace) -> int:
    from ratefit.models.keys import parse_key
    from ratefit.models.store import ModelStore

    art = ModelStore(args.store).load(str(parse_key(args.key)))
    d = predict_dict(art, args.rate)
    if args.output == "json":
        print(json.dumps(d))
    else:
        note = "  (EXTRAPOLATED: outside the trained range " \
               f"{art.rate_range[0]:.4g}-{art.rate_range[1]:.4g} req/s)" if d["extrapolated"] else ""
        print(f"{d['key']} at {args.rate:g} req/s: demand {d['cpu_m']}m, upper {d['upper_m']}m "
              f"(coverage {art.coverage:g}){note}")
    return 0
