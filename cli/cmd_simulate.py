"""``buswitness simulate``: simulate a bus with faults and write a capture with its ground truth."""

from __future__ import annotations

import argparse

from buswitness.errors import NotBuiltYet

HELP = "simulate a bus with faults and write a capture with its ground truth"


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("simulate", help=HELP + " [not built yet]", description=HELP.capitalize() + ".")
    p.add_argument("rest", nargs=argparse.REMAINDER, help=argparse.SUPPRESS)
    p.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    raise NotBuiltYet("'buswitness simulate' is not built yet in this version; nothing was done")
