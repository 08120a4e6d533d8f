"""``buswitness dataset``: captures of many buses and nights into one Parquet dataset (docs/fleet.md)."""

from __future__ import annotations

import argparse
from pathlib import Path

HELP = "add captures to a fleet dataset (Parquet, partitioned by site, bus and date) or check one"


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("dataset", help=HELP, description=HELP.capitalize() + ".")
    verbs = p.add_subparsers(dest="dataset_verb", metavar="{add,check}")
    verbs.required = True
    a = verbs.add_parser("add", help="analyse captures into the dataset at DIR (a capture already there is skipped)",
                         description="Analyse each capture and add its frames, transactions, events and per-station "
                                     "figures to the dataset at DIR. A capture is in whole or not at all; adding the "
                                     "same content again does nothing.")
    a.add_argument("dir", metavar="DIR", help="the dataset folder (made when missing)")
    a.add_argument("captures", metavar="CAPTURE", nargs="+", help="capture files (first part of a rotated set)")
    a.add_argument("--site", default="default", help="site name for these captures (default: default)")
    a.add_argument("--bus", default="default", help="bus name for these captures (default: default)")
    a.add_argument("--timeout", type=_timeout, default=None,
                   help="the master's response timeout, e.g. 200ms; default: inferred per capture")
    where = a.add_mutually_exclusive_group()
    where.add_argument("--scheduler", metavar="ADDRESS", default=None,
                       help="build on a running Dask cluster (e.g. tcp://10.0.0.5:8786); its workers must see DIR and "
                            "the captures at the same paths. Default: a local Dask cluster when there is more than "
                            "one capture to build")
    where.add_argument("--serial", action="store_true", help="build one capture after another in this process")
    a.add_argument("--workers", type=_positive, default=None, help="workers of the local cluster (default: one per core)")
    a.add_argument("--no-progress", action="store_true", help="no progress bar, even on a terminal")
    a.set_defaults(run=run_add)
    c = verbs.add_parser("check", help="check that every capture in DIR is whole and listed; repair what a killed "
                                       "add left behind", description="Check the dataset and repair it after an "
                                                                     "interrupted add.")
    c.add_argument("dir", metavar="DIR")
    c.set_defaults(run=run_check)


def _timeout(text: str) -> float:
    from buswitness.cli.cmd_analyze import timeout_arg
    return timeout_arg(text)


def _positive(text: str) -> int:
    try:
        n = int(text)
    except ValueError:
        n = 0
    if n < 1:
        raise argparse.ArgumentTypeError(f"{text!r}: give a whole number of workers, 1 or more")
    return n


def run_add(args: argparse.Namespace) -> int:
    from buswitness.analysis.dataset import add_captures, check_name
    from buswitness.cli.progress import bar
    check_name("site", args.site)
    check_name("bus", args.bus)
    scheduler = None if args.serial else (args.scheduler or ("local" if len(set(args.captures)) > 1 else None))
    with bar("adding captures", False if args.no_progress else None, unit="files") as progress:
        done = add_captures(args.dir, args.captures, site=args.site, bus=args.bus, scheduler=scheduler,
                            workers=args.workers, timeout_ms=args.timeout, progress=progress)
    added = [d for d in done if d.status == "added"]
    for d in done:
        print(f"{d.status:8s} {d.capture_id}  {d.path}" + (f"  ({d.frames} frames, {d.seconds:.1f} s)"
                                                           if d.status == "added" else ""))
    print(f"{len(added)} capture(s) added, {len(done) - len(added)} already in {Path(args.dir).resolve()}")
    return 0


def run_check(args: argparse.Namespace) -> int:
    from buswitness.analysis.dataset import check, manifest, repair
    from buswitness.errors import InputFileError
    if not Path(args.dir).is_dir():
        raise InputFileError(args.dir, "no such dataset folder")
    fixed = repair(args.dir)
    problems = check(args.dir)
    print(f"{len(manifest(args.dir))} capture(s); repaired: {fixed['staging_dropped']} unfinished build(s) dropped, "
          f"{fixed['manifest_restored']} manifest entr(ies) restored, {fixed['manifest_stale']} stale removed")
    for p in problems:
        print(f"  problem: {p}")
    return 0 if not problems else 3
