"""``buswitness detect``: find a bus's baud rate and character format from its traffic."""

from __future__ import annotations

import argparse

from buswitness.errors import NotBuiltYet

HELP = "find a bus's baud rate and character format from its traffic"


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("detect", help=HELP + " [not built yet]", description=HELP.capitalize() + ".")
    p.add_argument("rest", nargs=argparse.REMAINDER, help=argparse.SUPPRESS)
    p.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    raise NotBuiltYet("'buswitness detect' is not built yet in this version; nothing was done")
