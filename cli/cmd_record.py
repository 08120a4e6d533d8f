"""``buswitness record``: record a bus to a capture file through a serial adapter (listen-only)."""

from __future__ import annotations

import argparse

from buswitness.errors import NotBuiltYet

HELP = "record a bus to a capture file through a serial adapter (listen-only)"


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("record", help=HELP + " [not built yet]", description=HELP.capitalize() + ".")
    p.add_argument("rest", nargs=argparse.REMAINDER, help=argparse.SUPPRESS)
    p.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    raise NotBuiltYet("'buswitness record' is not built yet in this version; nothing was done")
