"""``buswitness watch``: live per-station figures in the terminal."""

from __future__ import annotations

import argparse

from buswitness.errors import NotBuiltYet

HELP = "live per-station figures in the terminal"


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("watch", help=HELP + " [not built yet]", description=HELP.capitalize() + ".")
    p.add_argument("rest", nargs=argparse.REMAINDER, help=argparse.SUPPRESS)
    p.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    raise NotBuiltYet("'buswitness watch' is not built yet in this version; nothing was done")
