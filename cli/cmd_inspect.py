"""``buswitness inspect``: print a capture file's header and record counts."""

from __future__ import annotations

import argparse
import collections

from buswitness.capture.fileformat import flag_names
from buswitness.capture.sources import open_capture
from buswitness.cli.common import add_input_options, serial_halves
from buswitness.decode.timing import t15_s, t35_s
from buswitness.textsafe import visible

HELP = "print a capture file's header, record counts and any damage found"


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("inspect", help=HELP, description=HELP.capitalize() + ".")
    p.add_argument("capture", help="capture file (.bwcap, any part of a rotated set), hex text or raw bytes")
    add_input_options(p)
    p.set_defaults(run=run)


def show(line: str) -> None:
    """One line on stdout, with any control character from the capture (names, notes, paths) as an escape."""
    print(visible(line))


def run(args: argparse.Namespace) -> int:
    src = open_capture(args.capture, kind=args.input_kind, on_bad_line=args.on_bad_line, **serial_halves(args))
    h = src.header
    show(f"capture      {', '.join(str(p) for p in src.paths)}")
    show(f"source       {h.source} (format version {h.format_version}, written by buswitness {h.tool_version})")
    show(f"serial       {h.serial} (character {h.serial.char_time_s * 1e3:.3f} ms, "
         f"t1.5 {t15_s(h.serial) * 1e3:.3f} ms, t3.5 {t35_s(h.serial) * 1e3:.3f} ms)")
    for port in h.ports:
        lat = f"{port.latency_ms:g} ms ({port.latency_source})" if port.latency_ms is not None else "unknown"
        show(f"port {port.id}       {port.name}  adapter latency {lat}")
    show(f"started      {h.start_utc or 'unknown'}  host {h.host or 'unknown'}")
    if h.notes:
        show(f"notes        {h.notes}")
    per_port: collections.Counter = collections.Counter()
    per_port_bytes: collections.Counter = collections.Counter()
    flags: collections.Counter = collections.Counter()
    first = last = None
    for batch in src.iter_batches():
        if not len(batch):
            continue
        first = int(batch.t_ns[0]) if first is None else first
        last = int(batch.t_ns[-1])
        for port in set(batch.port.tolist()):
            mask = batch.port == port
            per_port[port] += int(mask.sum())
            per_port_bytes[port] += int(batch.length[mask].sum())
        for f in set(batch.flags.tolist()):
            if f:
                for name in flag_names(f):
                    flags[name] += int((batch.flags == f).sum())
    span = (last - first) / 1e9 if first is not None and last is not None else 0.0
    show(f"span         {span:.3f} s between first and last record")
    for port in sorted(per_port):
        show(f"records      port {port}: {per_port[port]} records, {per_port_bytes[port]} bytes")
    if flags:
        show("marks        " + ", ".join(f"{name} {count}" for name, count in sorted(flags.items())))
    rep = src.report
    for w in rep.warnings:
        show(f"warning      {w}")
    show("state        " + ("complete" if rep.clean else "damaged or cut off (every readable record kept)"))
    return 0
