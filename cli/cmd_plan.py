"""``buswitness plan check``: judge a bus description, alone or joined with a capture's traffic."""

from __future__ import annotations

import argparse
import json
from pathlib import Path

from buswitness.cli.common import add_input_options, roles_arg

HELP = "check a bus description (the bus as built), alone or against a capture"


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("plan", help=HELP, description=HELP.capitalize() + ". See docs/plan.md.")
    verbs = p.add_subparsers(dest="plan_verb", metavar="SUBCOMMAND")
    c = verbs.add_parser("check", help="judge BUS.toml by the rules of RS-485 and Modbus serial line",
                         description="Judge a bus description: unit loads, segment length, terminators, bias, "
                                     "stubs, topology, shield, signal common, repeaters and A/B wiring, each pass, "
                                     "warn or fail with its numbers, fix and source. With --capture, place the "
                                     "traffic's errors along the cable and join them with the rules.")
    c.add_argument("description", metavar="BUS.toml", help="bus description (a station map with a [bus] table)")
    c.add_argument("--capture", metavar="CAPTURE", default=None,
                   help="capture file, hex text or raw bytes of the same bus, to join with the description")
    c.add_argument("--html", metavar="FILE", help="write the drawing and the results as one page (plan.html)")
    c.add_argument("--json", metavar="FILE", help="write the results as JSON")
    from buswitness.cli.cmd_analyze import timeout_arg
    c.add_argument("--timeout", type=timeout_arg, default=None,
                   help="with --capture: the master's response timeout, e.g. 200ms (default: inferred)")
    c.add_argument("--roles", type=roles_arg, default=None, metavar="ROLE[,ROLE]",
                   help="with --capture: what each port hears (master, slaves or both)")
    c.add_argument("--no-progress", action="store_true", help="no progress bar, even on a terminal")
    add_input_options(c)
    c.set_defaults(run=run_check)
    p.set_defaults(run=_no_subcommand)


def _no_subcommand(args: argparse.Namespace) -> int:
    from buswitness.errors import UsageError
    raise UsageError("give a subcommand: buswitness plan check BUS.toml [--capture CAPTURE]")


def run_check(args: argparse.Namespace) -> int:
    from buswitness.analysis.busplan import load_plan
    from buswitness.analysis.planreport import plan_json, plan_text, write_plan_page
    from buswitness.analysis.planrules import check_plan
    from buswitness.fsutil import check_output_path

    for path, option in ((args.html, "--html"), (args.json, "--json")):
        if path:
            check_output_path(path, option)  # before reading a long capture
    plan = load_plan(args.description)
    results = check_plan(plan)
    result = None
    findings: list = []
    if args.capture:
        from buswitness.cli.cmd_analyze import run_analysis
        result = run_analysis(_analysis_args(args))
        findings = result.findings  # the joined findings (analysis/planjoin.py) rank with the traffic's own
    print(plan_text(plan, results, findings, result))
    written = []
    if args.html:
        written.append(write_plan_page(plan, results, findings, result, args.html))
    if args.json:
        from buswitness.fsutil import atomic_write
        with atomic_write(args.json) as f:
            f.write(json.dumps(plan_json(plan, results, findings, result), indent=1) + "\n")
        written.append(Path(args.json))
    if written:
        print("wrote:")
        for p in written:
            print(f"  {Path(p).resolve()}")
    return 0


def _analysis_args(args: argparse.Namespace) -> argparse.Namespace:
    """The options ``analyze`` would have been given for the same capture and description."""
    return argparse.Namespace(capture=args.capture, stations=args.description, timeout=args.timeout,
                              roles=args.roles, no_progress=args.no_progress, input_kind=args.input_kind,
                              on_bad_line=args.on_bad_line, baud=args.baud, char_format=args.char_format)
