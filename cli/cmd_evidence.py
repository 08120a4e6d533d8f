"""``buswitness evidence``: write the evidence report on one station for its vendor."""

from __future__ import annotations

import argparse

from buswitness.errors import NotBuiltYet

HELP = "write the evidence report on one station for its vendor"


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("evidence", help=HELP + " [not built yet]", description=HELP.capitalize() + ".")
    p.add_argument("rest", nargs=argparse.REMAINDER, help=argparse.SUPPRESS)
    p.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    raise NotBuiltYet("'buswitness evidence' is not built yet in this version; nothing was done")
