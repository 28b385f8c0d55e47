"""`ratefit run` — placeholder until its issue lands (replace this module)."""

from __future__ import annotations

import argparse


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("run", help="(not built yet)")
    p.set_defaults(handler=_run)


def _run(args: argparse.Namespace) -> int:
    raise SystemExit("ratefit run: not built yet")
