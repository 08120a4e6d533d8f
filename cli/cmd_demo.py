"""``buswitness demo``: simulate the demo pump-station night, analyse it and write the reports."""

from __future__ import annotations

import argparse

from buswitness.errors import NotBuiltYet

HELP = "simulate the demo pump-station night, analyse it and write the reports"


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("demo", help=HELP + " [not built yet]", description=HELP.capitalize() + ".")
    p.add_argument("rest", nargs=argparse.REMAINDER, help=argparse.SUPPRESS)
    p.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    raise NotBuiltYet("'buswitness demo' is not built yet in this version; nothing was done")
