"""``buswitness watch``: live per-station figures in the terminal."""

from __future__ import annotations

import argparse
import sys
import time

from buswitness.analysis.rolling import RollingStations
from buswitness.capture.recorder import Recorder
from buswitness.cli.cmd_record import (
    LiveFigures,
    add_recording_options,
    config_from_args,
    run_recorder,
    summary,
)
from buswitness.cli.common import duration_s
from buswitness.textsafe import visible
from rich.console import RenderableType

HELP = "live per-station figures in the terminal"

DESCRIPTION = """Show, every second, what each station on the bus is doing: requests, answers,
timeouts, the last response time and the 95th percentile of recent ones. Listen-only, as
'record'; with -o it records the same traffic to a capture file at the same time."""


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("watch", help=HELP, description=DESCRIPTION,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("ports", nargs="+", metavar="PORT", help="serial device or pyserial URL (one or two)")
    add_recording_options(p, output_required=False)
    p.add_argument("--duration", type=duration_s, default=None, help="stop after this long (default: Ctrl-C)")
    p.set_defaults(run=run)


def _ms(value: float | None) -> str:
    return "-" if value is None else f"{value:.1f}"


def station_table(figures: RollingStations, rec: Recorder | None = None, note: str | None = None) -> RenderableType:
    """The live table: one row per station; the ports' byte counts and any note underneath."""
    from rich.table import Table

    lines = []
    if rec is not None:
        elapsed = (time.monotonic_ns() - rec.start_ns) / 1e9 if rec.start_ns else 0.0
        for s in rec.stats:
            rate = f", {s.bytes / elapsed:.0f} B/s" if elapsed > 0 else ""
            state = " (gone, retrying)" if not s.connected else ""
            lines.append(visible(f"{s.name}: {s.bytes} B{rate}{state}"))
    if note:
        lines.append(visible(note))
    table = Table(title="stations (live)", caption="\n".join(lines) or None)
    for col in ("station", "requests", "answered", "timeouts", "exc.", "CRC err", "last ms", "p95 ms"):
        table.add_column(col, justify="right")
    for st in figures.rows():
        table.add_row(str(st.station), str(st.requests), str(st.answered), str(st.timeouts), str(st.exceptions),
                      str(st.crc_errors), _ms(st.last_response_ms), _ms(st.p95_ms))
    return table


def run(args: argparse.Namespace) -> int:
    from rich.console import Console
    from rich.live import Live

    cfg = config_from_args(args, args.ports)
    console = Console(stderr=True)
    live_view = sys.stdout.isatty()
    out = Console(soft_wrap=True) if live_view else Console(soft_wrap=True, width=120)

    def message(text: str) -> None:
        console.print(visible(text, keep_newlines=True), markup=False, highlight=False, soft_wrap=True)

    rec = Recorder(cfg, on_message=message)
    figures = LiveFigures(rec)
    rec.tap = figures.tap

    said: list[bool] = []

    def table() -> RenderableType:
        dec = figures.decoder
        if figures.tried and dec is None and not said:
            said.append(True)
            message("the decoder is not available in this build: only byte counts are shown")
        return station_table(dec.figures if dec else RollingStations(), rec, dec.disabled_reason if dec else None)

    def render() -> RenderableType:
        figures.update()
        return table()

    try:
        if live_view:
            with Live(console=out, refresh_per_second=1, auto_refresh=False) as live:
                run_recorder(rec, args.duration, lambda: live.update(render(), refresh=True), period_s=1.0)
        else:
            run_recorder(rec, args.duration, figures.update, period_s=1.0)
    finally:
        figures.finish()
        if rec.writer is not None:
            if not live_view:
                out.print(table())
            message(summary(rec))
    return 0
