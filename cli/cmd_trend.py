"""``buswitness trend``: per station and night figures from a fleet dataset, and what changed when."""

from __future__ import annotations

import argparse
import datetime as dt
from pathlib import Path

HELP = "per station and night figures from a dataset, what changed and when, as text and an HTML page"


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("trend", help=HELP, description=HELP.capitalize() + " (queries run on DuckDB over the "
                       "dataset's Parquet files).")
    p.add_argument("dir", metavar="DIR", help="the dataset folder (buswitness dataset add)")
    p.add_argument("--station", type=_address, default=None, help="only this station address")
    p.add_argument("--site", default=None, help="only this site")
    p.add_argument("--bus", default=None, help="only this bus")
    p.add_argument("--since", type=_date, default=None, metavar="YYYY-MM-DD", help="only nights from this date on (the UTC date a capture starts on, as the dataset's date= folders)")
    p.add_argument("--html", metavar="FILE", default="trend.html", help="write the page here (default: trend.html)")
    p.add_argument("--json", metavar="FILE", default=None, help="also write the nightly figures and changes as JSON")
    p.set_defaults(run=run)


def _address(text: str) -> int:
    try:
        n = int(text)
    except ValueError:
        n = -1
    if not 0 <= n <= 255:
        raise argparse.ArgumentTypeError(f"{text!r}: a station address is a whole number from 0 to 255")
    return n


def _date(text: str) -> dt.date:
    try:
        return dt.date.fromisoformat(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r}: give a date as YYYY-MM-DD") from None


def run(args: argparse.Namespace) -> int:
    import json

    from buswitness.analysis.trend import changes, nightly, text_summary, write_page
    from buswitness.fsutil import atomic_write, check_output_path

    for path, option in ((args.html, "--html"), (args.json, "--json")):
        if path:
            check_output_path(path, option)
    table = nightly(args.dir, station=args.station, site=args.site, bus=args.bus, since=args.since)
    found = changes(table)
    print(text_summary(table, found))
    filters = {"station": args.station, "site": args.site, "bus": args.bus,
               "since": None if args.since is None else args.since.isoformat()}
    written = [write_page(args.html, table, found, args.dir, filters)]
    if args.json:
        rows = json.loads(table.assign(night=table["night"].astype(str)).to_json(orient="records"))
        with atomic_write(args.json) as f:
            json.dump({"nights": rows, "changes": [c.to_dict() for c in found]}, f, indent=1)
            f.write("\n")
        written.append(Path(args.json))
    print("wrote:")
    for p in written:
        print(f"  {Path(p).resolve()}")
    return 0
