"""``buswitness simulate``: simulate a bus with faults and write a capture with its ground truth."""

from __future__ import annotations

import argparse
import os

from buswitness.cli.common import add_protocol_option, baud_arg, duration_at_most, format_arg, number_arg
from buswitness.errors import EXIT_OK, OutputError, UsageError

HELP = "simulate a bus with faults and write a capture with its ground truth"

#: Longest simulated time: a week of bus time takes several minutes and gigabytes (an 8 h night: ~15 s).
MAX_DURATION_S = 7 * 86400.0


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("simulate", help=HELP, description=HELP.capitalize() + ".")
    p.add_argument("--scenario", default="pumpstation",
                   help="built-in scenario name (see --list) or a scenario file (.json or .toml); "
                        "default: pumpstation")
    p.add_argument("--duration", type=duration_at_most(MAX_DURATION_S, "a week of bus time"), default=None,
                   help="simulated time, e.g. 8h, 90m, 30s (default: the scenario's own)")
    p.add_argument("--seed", type=number_arg(0, 2**32 - 1, "--seed", integer=True), default=1, help="random seed; the same seed gives the same capture")
    p.add_argument("-o", "--output", help="capture file to write (.bwcap); refused if it exists")
    p.add_argument("--truth", help="also write the ground truth as JSON here; refused if it exists")
    p.add_argument("--latency-ms", type=number_arg(0.001, 10_000, "--latency-ms"), default=None,
                   help="adapter latency timer in ms (e.g. 16 or 1)")
    p.add_argument("--baud", type=baud_arg, default=None, help="override the bus baud rate only (default: the scenario's own)")
    p.add_argument("--format", dest="char_format", type=format_arg, default=None,
                   help="override the bus character format only: 8E1, 8N2, 8N1, ... (default: the scenario's own)")
    p.add_argument("--list", action="store_true", help="list the built-in scenarios and exit")
    add_protocol_option(p, from_file=False)
    p.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    from buswitness.fsutil import MAX_TEXT_INPUT_BYTES, check_input_file
    from buswitness.simulate import builtin_descriptions, load_scenario, profibus, simulate

    if args.list:
        for name, text in builtin_descriptions().items():
            print(f"{name:24s} {text}")
        print(f"{profibus.NAME:24s} {profibus.DESCRIPTION}")
        return EXIT_OK
    if not args.output:
        raise UsageError("give the capture file to write with -o CAPTURE.bwcap (or --list to see the scenarios)")
    from buswitness.fsutil import check_output_path

    for path, option in ((args.output, "-o"), (args.truth, "--truth")):
        if path and os.path.exists(path):
            raise OutputError(f"{path}: already exists; choose another output name (nothing was overwritten)")
        if path:
            check_output_path(path, option)
    if args.seed < 0:
        raise UsageError(f"--seed must be zero or more, not {args.seed}")
    if args.protocol == "profibus-dp" or args.scenario == profibus.NAME:
        return _run_profibus(args, profibus)
    if args.protocol not in (None, "modbus-rtu"):
        raise UsageError(f"the built-in scenarios simulate Modbus RTU or (scenario {profibus.NAME}) Profibus DP, "
                         f"not {args.protocol}")
    if os.path.lexists(args.scenario) and args.scenario not in builtin_descriptions():
        check_input_file(args.scenario, "scenario file", MAX_TEXT_INPUT_BYTES)
    sc = load_scenario(args.scenario)
    res = simulate(sc, duration_s=args.duration, seed=args.seed, latency_ms=args.latency_ms, baud=args.baud,
                   bus_format=args.char_format, keep_tables=bool(args.truth))
    info = _write(res, args)
    s = res.scenario
    print(f"simulated {res.duration_s:g} s of scenario {s.name} ({s.serial}, adapter latency "
          f"{s.adapter.latency_ms:g} ms, seed {res.seed}) in {info['seconds']:.1f} s")
    _wrote(args, info, "frames", "frames, transactions, events, per-station figures")
    return EXIT_OK


def _write(sim, args: argparse.Namespace) -> dict:
    """Write the capture (and truth); on any failure remove what was begun, so nothing half written stays."""
    try:
        return sim.write(args.output, args.truth)
    except BaseException:
        for path in (args.output, args.truth):
            if path and os.path.exists(path):
                os.unlink(path)
        raise


def _wrote(args: argparse.Namespace, info: dict, units: str, truth: str) -> None:
    print(f"wrote {args.output}: {info['records']} records, {info['bytes']} bytes, {info['frames']} {units} on the wire")
    if args.truth:
        print(f"wrote {args.truth}: ground truth ({truth})")


def _run_profibus(args: argparse.Namespace, profibus) -> int:
    """The Profibus DP scenario (simulate/profibus.py)."""
    if args.scenario not in (profibus.NAME, "pumpstation"):
        raise UsageError(f"the Profibus DP scenario is {profibus.NAME}; {args.scenario!r} is a Modbus scenario")
    sim = profibus.simulate_profibus(duration_s=args.duration or 20.0, seed=args.seed, baud=args.baud)
    info = _write(sim, args)
    print(f"simulated {sim.duration_s:g} s of scenario {profibus.NAME} (Profibus DP, {sim.sc.serial}, seed {sim.seed}) "
          f"in {info['seconds']:.1f} s")
    _wrote(args, info, "telegrams", "per-slave requests, answers, retries, drop-outs; tokens per master")
    return EXIT_OK
