"""The ``ratefit`` command line: parse arguments, call library code, print.

Each subcommand lives in ``ratefit.controller.commands.<name>`` and exposes
``register(subparsers)``; that function adds its parser and sets
``handler=`` to a function ``(args) -> int``. Command modules import heavy
libraries (scikit-learn, FastAPI, kubernetes) inside their handlers so that
``ratefit --help`` stays fast. No decision logic lives here.
"""

from __future__ import annotations

import argparse
import importlib
import sys
from collections.abc import Sequence

from ratefit.models.errors import RatefitError

#: subcommands in the order ``--help`` lists them
COMMANDS = (
    "demo",
    "train",
    "models",
    "predict",
    "report",
    "serve",
    "sandbox",
    "plan",
    "check",
    "replay",
    "run",
    "revert",
    "profile",
)

DESCRIPTION = """\
ratefit sizes Kubernetes containers' CPU requests from the load they carry.
It learns, per container, a demand curve (request rate per pod -> CPU cores)
from Prometheus history or a CSV, serves the curves over a local HTTP sizing
API, and runs a reconcile loop that proposes (dry-run) or applies bounded,
rate-limited CPU request changes.

Start with `ratefit demo`, then `ratefit plan` against your own cluster:
review every proposal before you let `ratefit run` apply anything.
"""


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="ratefit",
        description=DESCRIPTION,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"ratefit {_version()}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)
    for name in COMMANDS:
        module = importlib.import_module(f"ratefit.controller.commands.{name}")
        module.register(sub)
    return parser


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("ratefit")
    except PackageNotFoundError:  # pragma: no cover - running from a source tree
        return "0+unknown"


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.handler(args) or 0)
    except RatefitError as exc:
        print(f"ratefit {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print(f"ratefit {args.command}: interrupted", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
