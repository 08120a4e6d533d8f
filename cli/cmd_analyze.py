"""``buswitness analyze``: analyse a capture: per-station figures, findings, dashboard and exports."""

from __future__ import annotations

import argparse
from pathlib import Path

from buswitness.cli.common import add_input_options, add_protocol_option, roles_arg, serial_halves
from buswitness.textsafe import visible

HELP = "analyse a capture: per-station figures, findings, dashboard and exports"


#: No master waits minutes for an answer; a larger value is a typing error (common practice).
MAX_TIMEOUT_MS = 600_000.0


def timeout_arg(text: str) -> float:
    """``200ms``, ``0.2s`` or a bare number of milliseconds, as milliseconds."""
    from buswitness.cli.common import _DECIMAL, duration_s
    s = str(text).strip()
    if _DECIMAL.match(s):
        value = float(s)
    else:
        value = duration_s(s) * 1000.0
    if not 0 < value <= MAX_TIMEOUT_MS:
        raise argparse.ArgumentTypeError(
            f"{text!r}: a master timeout must be more than zero and at most {MAX_TIMEOUT_MS / 1000:.0f} s "
            f"(e.g. 200ms or 1s)")
    return value


def jobs_arg(text: str) -> int:
    if not (text.strip().isascii() and text.strip().isdigit()) or not 1 <= int(text) <= 64:
        raise argparse.ArgumentTypeError(f"{text!r}: the number of decoding processes is a whole number, 1 to 64")
    return int(text)


def cache_wanted(args: argparse.Namespace) -> bool:
    """The decoded cache is used unless ``--no-cache`` or BUSWITNESS_DECODED_CACHE=off says otherwise."""
    import os
    return not getattr(args, "no_cache", False) and os.environ.get("BUSWITNESS_DECODED_CACHE", "") != "off"


def notice(text: str) -> None:
    """A one-line notice on standard error (the cache skipped, a seam decoded in one pass)."""
    import sys
    print(visible(f"note: {text}"), file=sys.stderr)


def add_analysis_options(p: argparse.ArgumentParser) -> None:
    """Options shared by ``analyze`` and ``evidence``: the input and how to judge it."""
    p.add_argument("capture", help="capture file (or first part of a rotated set), hex text or raw bytes")
    p.add_argument("--timeout", type=timeout_arg, default=None,
                   help="the master's response timeout, e.g. 200ms (a bare number is ms); default: inferred "
                        "from the traffic and reported as inferred")
    p.add_argument("--stations", metavar="TOML", default=None,
                   help='station map: [stations.7] name = "Pump drive B", position_m = 310, notes = "..."')
    p.add_argument("--no-progress", action="store_true", help="no progress bar, even on a terminal")
    p.add_argument("--roles", type=roles_arg, default=None, metavar="ROLE[,ROLE]",
                   help="what each port of the capture hears, in port order (master, slaves or both), when "
                        "the recording did not say; e.g. master,slaves for a four-wire bus")
    p.add_argument("--no-cache", action="store_true",
                   help="neither use nor leave the decoded cache next to the capture (CAPTURE.bwdecoded.parquet)")
    p.add_argument("--jobs", type=jobs_arg, default=None, metavar="N",
                   help="processes decoding a long capture in segments at once (default: one per core; 1: one "
                        "pass)")
    add_input_options(p)
    add_protocol_option(p)


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("analyze", help=HELP, description=HELP.capitalize() + ". With no output option, "
                       "writes report.html and summary.json into the current directory.")
    add_analysis_options(p)
    p.add_argument("--html", metavar="FILE", help="write the dashboard here")
    p.add_argument("--json", metavar="FILE", help="write summary.json here")
    p.add_argument("--csv", metavar="DIR", help="write transactions.csv, frames.csv and events.csv into DIR")
    p.add_argument("--parquet", metavar="DIR", help="write the same three tables as Parquet into DIR")
    p.set_defaults(run=run)


def run_analysis(args: argparse.Namespace, csv_dir: str | None = None, parquet_dir: str | None = None,
                 sinks: tuple = ()):
    """Open the input read-only and analyse it as the options say, feeding ``sinks`` (analysis/sinks)."""
    from buswitness.analysis.stationmap import load_station_map
    from buswitness.capture.sources import open_capture
    from buswitness.cli.progress import analyze_with_bar
    from buswitness.errors import InputFileError

    # The inputs are read (the station map whole, the capture's header) before the analysis modules
    # load, so a wrong path or a damaged header is refused at once.
    smap = load_station_map(args.stations) if args.stations else None
    source = open_capture(args.capture, args.input_kind, on_bad_line=args.on_bad_line, **serial_halves(args))
    if args.roles and len(args.roles) != len(source.header.ports):
        from buswitness.errors import UsageError

        raise UsageError(visible(f"--roles names {len(args.roles)} role(s) but {args.capture} holds "
                                 f"{len(source.header.ports)} port(s); give one role per port"))

    from buswitness.analysis import AnalysisOptions

    roles = dict(enumerate(args.roles)) if args.roles else None
    options = AnalysisOptions(timeout_ms=args.timeout, station_map=smap, csv_dir=csv_dir, parquet_dir=parquet_dir,
                              port_roles=roles, protocol=getattr(args, "protocol", None),
                              cache=cache_wanted(args), jobs=getattr(args, "jobs", None),
                              notice=notice)
    result = analyze_with_bar(source, options, sinks, show=False if args.no_progress else None)
    damage = result.damage
    if result.bus.frames == 0 and damage is not None and not damage.clean:
        raise InputFileError(args.capture, "holds nothing usable: " + "; ".join(damage.warnings[:3]),
                             "the file is damaged beyond what can be read")
    return result


def run(args: argparse.Namespace) -> int:
    from buswitness.fsutil import check_output_dir, check_output_path

    html, js = args.html, args.json
    if not any((html, js, args.csv, args.parquet)):
        html, js = "report.html", "summary.json"
    for folder, option in ((args.csv, "--csv"), (args.parquet, "--parquet")):
        if folder:
            check_output_dir(folder, option)
    made = [f for f in (args.csv, args.parquet) if f]  # the folders these options make may hold the others
    for path, option in ((html, "--html"), (js, "--json")):
        if path:
            check_output_path(path, option, made_here=made)

    from buswitness.analysis.sinks.csv import CsvSink
    from buswitness.analysis.sinks.dashboard import DashboardSink
    from buswitness.analysis.sinks.parquet import ParquetSink
    from buswitness.analysis.sinks.summary import SummarySink
    from buswitness.cli.report_text import analyze_text

    sinks = ([DashboardSink(html)] if html else []) + ([SummarySink(js)] if js else []) + (
        [CsvSink(args.csv)] if args.csv else []) + ([ParquetSink(args.parquet)] if args.parquet else [])
    result = run_analysis(args, sinks=tuple(sinks))
    print(analyze_text(result))
    print("wrote:")
    for p in result.written:
        print(visible(f"  {Path(p).resolve()}"))
    return 0
