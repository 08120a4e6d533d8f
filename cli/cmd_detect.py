"""``buswitness detect``: find a bus's baud rate and character format from its traffic."""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

from buswitness import detect
from buswitness.cli.common import add_protocol_option, baud_arg, format_arg, number_arg
from buswitness.errors import InputFileError, NotACaptureError
from buswitness.serial import COMMON_BAUD_RATES
from buswitness.textsafe import visible

HELP = "find a bus's baud rate and character format from its traffic"

#: Listening longer than 10 minutes per setting finds nothing a minute does not (common practice).
MAX_SECONDS = 600.0
#: More rows than any list of candidate settings has.
MAX_TOP = 1000

DESCRIPTION = """Listen to a port at each common baud rate and character format for a few seconds
each (listen-only, as 'record') and rank the settings by the share of the traffic that reads
as CRC-valid Modbus RTU frames without parity or framing marks; the character time seen in
the read timestamps separates formats a receiver reads alike (8N1 and 8N2).

Given a capture file instead, check the settings in its header against its contents."""


def _list(kind):
    def parse(text: str) -> list:
        try:
            return [kind(x) for x in text.replace(",", " ").split()]
        except argparse.ArgumentTypeError as exc:
            raise argparse.ArgumentTypeError(str(exc)) from None
    return parse


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("detect", help=HELP, description=DESCRIPTION,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("target", metavar="PORT|CAPTURE", help="serial device or pyserial URL, or a capture file")
    p.add_argument("--seconds", type=number_arg(0.1, MAX_SECONDS, "--seconds"), default=3.0,
                   help=f"listening time per setting, 0.1 to {MAX_SECONDS:g} (default 3)")
    p.add_argument("--bauds", type=_list(baud_arg), default=None,
                   help=f"baud rates to try, e.g. 9600,19200 (default: {','.join(map(str, COMMON_BAUD_RATES))})")
    p.add_argument("--formats", type=_list(format_arg), default=None,
                   help=f"formats to try (default: {','.join(detect.COMMON_FORMATS)})")
    p.add_argument("--top", type=number_arg(1, MAX_TOP, "--top", integer=True), default=8,
                   help=f"rows of the ranking to show, 1 to {MAX_TOP} (default 8)")
    add_protocol_option(p)
    p.set_defaults(run=run)


def print_ranking(scores: list[detect.Score], top: int) -> None:
    from rich.console import Console
    from rich.table import Table

    table = Table(title="settings ranked by how well they read the traffic")
    for col in ("#", "setting", "valid & unmarked", "in valid frames", "bytes", "marked", "timing"):
        table.add_column(col, justify="right" if col not in ("setting", "timing") else "left")
    for i, s in enumerate(scores[:top], 1):
        timing = {True: "agrees", False: "disagrees", None: "-"}[s.timing]
        if s.char_time_s is not None:
            timing += f" ({s.char_time_s * s.setting.baud:.1f} bits/char)"
        table.add_row(str(i), str(s.setting), f"{100 * s.value:.1f}%", f"{100 * s.explained:.1f}%", str(s.bytes),
                      str(s.marked), timing)
    Console(soft_wrap=True).print(table)


def open_capture_for_detect(path: Path):
    """``open_capture`` whose refusals never suggest an option ``detect`` does not take."""
    from buswitness.capture.sources import open_capture

    try:
        return open_capture(path)
    except InputFileError as exc:
        if "--" not in exc.hint:
            raise
        hint = ("detect checks buswitness captures and timestamped hex text" if isinstance(exc, NotACaptureError)
                else "")
        raise type(exc)(exc.path, exc.problem, hint) from None


def run(args: argparse.Namespace) -> int:
    from buswitness.cli.common import check_port

    target = Path(args.target)
    if "://" not in args.target and not os.path.exists(args.target):
        from buswitness.capture.serialport import available_ports

        seen = ", ".join(available_ports()) or "none"
        raise InputFileError(args.target, "no such file or serial port", f"serial ports seen now: {seen}")
    if "://" not in args.target and target.is_file():
        source = open_capture_for_detect(target)
        for info in source.header.ports:
            if len(source.header.ports) > 1:
                print(visible(f"port {info.id} ({info.name}):"))
            protocol = args.protocol or str(source.header.extra.get("protocol", "modbus-rtu"))
            check = detect.check_capture(source.header.serial, source.iter_batches(), port=info.id,
                                         protocol=protocol)
            print(visible(check.describe(), keep_newlines=True))
        return 0
    check_port(args.target)
    from buswitness.decode.protocols import get
    proto = get(args.protocol or "modbus-rtu")
    bauds = args.bauds or list(getattr(proto, "baud_rates", COMMON_BAUD_RATES))
    formats = args.formats or list(getattr(proto, "formats", detect.COMMON_FORMATS))
    trials = detect.candidates(bauds, formats)
    print(f"listening on {args.target} at {len(trials)} settings, {args.seconds:g} s each "
          f"(about {len(trials) * args.seconds:.0f} s; listen-only)", file=sys.stderr)
    scores = detect.rank_settings(detect.port_sampler(args.target, args.seconds), trials, proto.name)
    print_ranking(scores, args.top)
    print(detect.verdict(scores))
    return 0
