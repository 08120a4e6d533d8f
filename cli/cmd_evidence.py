"""``buswitness evidence``: write the evidence report on one station for its vendor."""

from __future__ import annotations

import argparse
from pathlib import Path

from buswitness.cli.cmd_analyze import add_analysis_options, run_analysis
from buswitness.textsafe import visible

HELP = "write the evidence report on one station for its vendor"


def station_arg(text: str) -> int:
    if not (text.strip().isascii() and text.strip().isdigit()):
        raise argparse.ArgumentTypeError(f"{text!r} is not a station address (1 to 247)")
    value = int(text)
    if not 1 <= value <= 247:
        raise argparse.ArgumentTypeError(f"{value} is not a station address (1 to 247)")
    return value


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("evidence", help=HELP, description=HELP.capitalize() + ": capture identity, method, "
                       "figures against the master's timeout, every late answer, and the limits of the capture.")
    add_analysis_options(p)
    p.add_argument("--station", type=station_arg, required=True, help="the station's address, e.g. 7")
    p.add_argument("-o", "--output", metavar="FILE", help="report to write (default: stationN.html)")
    p.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    from buswitness.fsutil import check_output_path

    output = args.output or f"station{args.station}.html"
    check_output_path(output, "-o")
    result = run_analysis(args)

    from buswitness.analysis.evidence import write_evidence

    path = write_evidence(result, args.station, output)
    s = result.station(args.station)
    if s is None:  # nothing was heard of this station (a silent capture): the report says why
        print(visible(f"station {args.station}: not one request or answer in this capture; "
                      "see the report's findings"))
        print(visible(f"wrote: {Path(path).resolve()}"))
        return 0
    print(visible(f"{s.label}: {s.requests} requests, {s.timeouts} timeouts, {s.late} late answers, "
                  f"p95 {s.response_ms['p95']} ms; master timeout {result.timeout.explanation}"))
    print(visible(f"wrote: {Path(path).resolve()}"))
    return 0
