"""``buswitness analyze``: analyse a capture: per-station figures, findings, dashboard and exports."""

from __future__ import annotations

import argparse

from buswitness.errors import NotBuiltYet

HELP = "analyse a capture: per-station figures, findings, dashboard and exports"


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("analyze", help=HELP + " [not built yet]", description=HELP.capitalize() + ".")
    p.add_argument("rest", nargs=argparse.REMAINDER, help=argparse.SUPPRESS)
    p.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    raise NotBuiltYet("'buswitness analyze' is not built yet in this version; nothing was done")
