"""Entry point of the ``buswitness`` command: parse, dispatch, turn expected errors into one line."""

from __future__ import annotations

import argparse
import sys
from collections.abc import Sequence
from typing import NoReturn

from buswitness import __version__
from buswitness.cli import (
    cmd_analyze,
    cmd_dataset,
    cmd_demo,
    cmd_detect,
    cmd_evidence,
    cmd_inspect,
    cmd_plan,
    cmd_record,
    cmd_simulate,
    cmd_trend,
    cmd_watch,
)
from buswitness.errors import EXIT_USAGE, BuswitnessError
from buswitness.textsafe import visible

VERBS = (cmd_demo, cmd_record, cmd_analyze, cmd_evidence, cmd_plan, cmd_simulate, cmd_detect, cmd_watch,
         cmd_inspect, cmd_dataset, cmd_trend)

EPILOG = """exit codes: 0 success, 2 usage error, 3 unreadable or invalid input file,
4 serial device error"""


class OneLineParser(argparse.ArgumentParser):
    """An argument parser whose usage errors are one line naming the option and where to read more."""

    def error(self, message: str) -> NoReturn:
        self.exit(EXIT_USAGE, f"{self.prog}: {message} (see '{self.prog} --help')\n")


def build_parser() -> argparse.ArgumentParser:
    parser = OneLineParser(
        prog="buswitness",
        description="Record an RS-485 Modbus RTU bus and find out which station times out, when, how often "
                    "and why.",
        epilog=EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--version", action="version", version=f"buswitness {__version__}")
    sub = parser.add_subparsers(dest="verb", metavar="VERB")
    for verb in VERBS:
        verb.add_parser(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "run", None):
        parser.print_help(sys.stderr)
        return EXIT_USAGE
    try:
        return int(args.run(args) or 0)
    except BuswitnessError as exc:
        print(f"buswitness {args.verb}: {visible(exc)}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print(f"buswitness {args.verb}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:
        return 0


if __name__ == "__main__":
    sys.exit(main())
