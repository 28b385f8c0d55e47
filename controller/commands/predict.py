"""`ratefit predict` — placeholder until its issue lands (replace this module)."""

from __future__ import annotations

import argparse


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("predict", help="(not built yet)")
    p.set_defaults(handler=_run)


def _run(args: argparse.Namespace) -> int:
    raise SystemExit("ratefit predict: not built yet")
