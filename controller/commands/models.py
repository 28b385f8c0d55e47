"""`ratefit models` — list the stored demand curves, or show one in full.

``ratefit models list --store DIR [--output table|json|markdown]`` and
``ratefit models show NAMESPACE/WORKLOAD/CONTAINER --store DIR [--output table|json|markdown]``.
JSON fields of ``show`` (cores and req/s throughout): model, chosen, cv (list of {model, rmse, mae,
p95, fit_seconds, params}), rate_range [lo, hi], coverage, band, samples (used),
samples_total, dropped (by reason), folds, seed, tuned, window, trained_at,
version, library, demand_at_range ([cores at lo, cores at hi]).

``ratefit models versions NAMESPACE/WORKLOAD/CONTAINER --store DIR`` lists the previous
versions the store keeps; ``ratefit models rollback NAMESPACE/WORKLOAD/CONTAINER --store DIR
[--to VERSION]`` makes one current again (the sizing API serves it after its next reload).
"""

from __future__ import annotations

import argparse
import json
import sys
from typing import Any


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("models", help="list stored demand curves or show one",
                       description="Inspect the model store (one JSON artifact per container key).")
    msub = p.add_subparsers(dest="models_command", metavar="ACTION", required=True)
    ls = msub.add_parser("list", help="one line per stored key (refused files are reported on stderr)")
    ls.add_argument("--store", required=True, metavar="DIR", help="model store directory")
    ls.add_argument("--output", choices=("table", "json", "markdown"), default="table",
                    help="output format (default table)")
    ls.set_defaults(handler=_list)
    sh = msub.add_parser("show", help="everything stored for one key: CV table, range, band, drops")
    sh.add_argument("key", metavar="NAMESPACE/WORKLOAD/CONTAINER", help="the model key")
    sh.add_argument("--store", required=True, metavar="DIR", help="model store directory")
    sh.add_argument("--output", choices=("table", "json", "markdown"), default="table",
                    help="output format (default table)")
    sh.set_defaults(handler=_show)
    vs = msub.add_parser("versions", help="the previous versions the store keeps for one key",
                         description="List the previous versions of one model, oldest first, and the current one.")
    vs.add_argument("key", metavar="NAMESPACE/WORKLOAD/CONTAINER", help="the model key")
    vs.add_argument("--store", required=True, metavar="DIR", help="model store directory")
    vs.add_argument("--output", choices=("table", "json"), default="table", help="output format (default table)")
    vs.set_defaults(handler=_versions)
    rb = msub.add_parser(
        "rollback", help="make a previous version of a model current again",
        description="Restore a previous version of one model as its current artifact. Without --to, the newest "
                    "previous version that differs from the current one. The replaced model is kept as a version "
                    "too, so a rollback can itself be rolled back. The sizing API serves the restored model after "
                    "its next reload (POST /v1/reload, or its periodic reload).")
    rb.add_argument("key", metavar="NAMESPACE/WORKLOAD/CONTAINER", help="the model key")
    rb.add_argument("--store", required=True, metavar="DIR", help="model store directory")
    rb.add_argument("--to", metavar="VERSION", help="the version to restore (at least its first 4 characters; "
                    "see 'ratefit models versions')")
    rb.set_defaults(handler=_rollback)


def show_dict(art: Any) -> dict[str, Any]:
    """The JSON object `models show --output json` prints for an artifact."""
    return {
        **art.describe(),
        "band": art.curve.band,
        "demand_at_range": [art.curve.cpu[0], art.curve.cpu[-1]],
        "library": dict(art.library),
        "units": {"cpu": "cores", "rate": "req/s per pod"},
    }


def _list(args: argparse.Namespace) -> int:
    from ratefit.models.store import ModelStore

    from ratefit.controller.commands.store_dir import existing_store

    loaded = ModelStore(existing_store(args.store)).load_all()
    for rel, err in loaded.errors.items():
        print(f"ratefit models list: refused {rel}: {err}", file=sys.stderr)
    arts = [loaded.artifacts[k] for k in sorted(loaded.artifacts)]
    if args.output == "json":
        rows = [
            {
                "model": a.key,
                "chosen": a.chosen,
                "rate_range": list(a.rate_range),
                "coverage": a.coverage,
                "samples": a.samples,
                "trained_at": a.trained_at,
                "version": a.version,
            }
            for a in arts
        ]
        print(json.dumps({"models": rows, "refused": loaded.errors}, indent=2))
        return 0
    head = ("MODEL", "ESTIMATOR", "RATE RANGE (req/s)", "SAMPLES", "TRAINED", "VERSION")
    table = [
        (a.key, a.chosen, f"{a.rate_range[0]:.4g}-{a.rate_range[1]:.4g}", str(a.samples), a.trained_at, a.version)
        for a in arts
    ]
    (_print_markdown if args.output == "markdown" else _print_table)(head, table)
    return 1 if loaded.errors and not arts else 0


def _show(args: argparse.Namespace) -> int:
    from ratefit.models.keys import parse_key
    from ratefit.models.store import ModelStore

    from ratefit.controller.commands.store_dir import existing_store

    key = str(parse_key(args.key, field="model"))
    art = ModelStore(existing_store(args.store)).load(key)
    d = show_dict(art)
    if args.output == "json":
        print(json.dumps(d, indent=2))
        return 0
    if args.output == "markdown":
        _show_markdown(d)
        return 0
    print(f"model        {d['model']}")
    print(f"estimator    {d['chosen']} (chosen by cross-validation)")
    print(f"rate range   {d['rate_range'][0]:.4g} - {d['rate_range'][1]:.4g} req/s per pod")
    print(f"demand       {d['demand_at_range'][0]:.4g} - {d['demand_at_range'][1]:.4g} cores over that range")
    print(f"band         +{d['band']:.4g} cores above the demand (coverage {d['coverage']:g})")
    dropped = ", ".join(f"{n} {r}" for r, n in d["dropped"].items() if n) or "none"
    print(f"samples      {d['samples']} used of {d['samples_total']} (dropped: {dropped})")
    w = d["window"]
    print(f"data         {w['source']}" + (f" {w['start']} .. {w['end']}" if w.get("start") else "")
          + (f" step {w['step']}" if w.get("step") else ""))
    print(f"trained      {d['trained_at']} (folds {d['folds']}, seed {d['seed']}, tuned {d['tuned']}), "
          f"version {d['version']}")
    print()
    _print_table(
        ("ESTIMATOR", "RMSE", "MAE", "P95", "FIT S", ""),
        [
            (r["model"], f"{r['rmse']:.4g}", f"{r['mae']:.4g}", f"{r['p95']:.4g}", f"{r['fit_seconds']:.3f}",
             "chosen" if r["model"] == d["chosen"] else "")
            for r in sorted(d["cv"], key=lambda r: r["rmse"])
        ],
    )
    print("(errors in cores, out-of-fold)")
    return 0


def _versions(args: argparse.Namespace) -> int:
    from ratefit.models.errors import ArtifactError, UnknownModel
    from ratefit.models.keys import parse_key
    from ratefit.models.store import ModelStore

    key = str(parse_key(args.key, field="model"))
    store = ModelStore(args.store)
    try:
        current = store.load(key)
    except (UnknownModel, ArtifactError):
        current = None
    rows = [{"version": a.version, "archived": stamp, "trained_at": a.trained_at, "chosen": a.chosen,
             "image": a.image, "current": current is not None and a.version == current.version}
            for stamp, a in store.versions(key)]
    if args.output == "json":
        print(json.dumps({"model": key, "current": current.version if current else None, "versions": rows}, indent=2))
        return 0
    print(f"model {key}: current version {current.version if current else '(none)'}")
    _print_table(("VERSION", "ARCHIVED", "TRAINED", "CHOSEN", "IMAGE"),
                 [(r["version"], r["archived"], r["trained_at"], r["chosen"], r["image"] or "-") for r in rows])
    return 0


def _rollback(args: argparse.Namespace) -> int:
    from ratefit.models.keys import parse_key
    from ratefit.models.store import ModelStore

    key = str(parse_key(args.key, field="model"))
    art = ModelStore(args.store).rollback(key, to=args.to)
    print(f"ratefit models rollback: {key} is now version {art.version} (trained {art.trained_at}); "
          "the sizing API serves it after its next reload")
    return 0


def _print_table(head: tuple[str, ...], rows: list[tuple[str, ...]]) -> None:
    widths = [max(len(h), *(len(r[i]) for r in rows)) if rows else len(h) for i, h in enumerate(head)]
    for r in (head, *rows):
        print("  ".join(c.ljust(w) for c, w in zip(r, widths)).rstrip())


def _print_markdown(head: tuple[str, ...], rows: list[tuple[str, ...]]) -> None:
    print("| " + " | ".join(head) + " |")
    print("|" + "|".join(" --- " for _ in head) + "|")
    for r in rows:
        print("| " + " | ".join(c.replace("|", "\\|") for c in r) + " |")


def _show_markdown(d: dict[str, Any]) -> None:
    print(f"### Model `{d['model']}`\n")
    _print_markdown(
        ("field", "value"),
        [
            ("chosen estimator", d["chosen"]),
            ("rate range (req/s per pod)", f"{d['rate_range'][0]:.4g} - {d['rate_range'][1]:.4g}"),
            ("demand over that range (cores)", f"{d['demand_at_range'][0]:.4g} - {d['demand_at_range'][1]:.4g}"),
            ("band above the demand (cores)", f"+{d['band']:.4g} (coverage {d['coverage']:g})"),
            ("samples", f"{d['samples']} used of {d['samples_total']}"),
            ("data", str(d["window"].get("source", ""))),
            ("trained", f"{d['trained_at']} (folds {d['folds']}, seed {d['seed']})"),
            ("version", d["version"]),
        ],
    )
    print()
    _print_markdown(
        ("estimator", "RMSE", "MAE", "P95", "fit s", ""),
        [
            (r["model"], f"{r['rmse']:.4g}", f"{r['mae']:.4g}", f"{r['p95']:.4g}", f"{r['fit_seconds']:.3f}",
             "chosen" if r["model"] == d["chosen"] else "")
            for r in sorted(d["cv"], key=lambda r: r["rmse"])
        ],
    )
