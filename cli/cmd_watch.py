"""``buswitness watch``: live per-station figures in the terminal, the same figures ``analyze`` gives."""

from __future__ import annotations

import argparse
import re
import sys
import time
from typing import TYPE_CHECKING

from buswitness.capture.recorder import Recorder
from buswitness.cli.cmd_record import (
    LiveFigures,
    add_recording_options,
    config_from_args,
    elapsed_s,
    run_recorder,
    silence_check,
    summary,
)
from buswitness.cli.common import duration_s
from buswitness.textsafe import visible
from rich.console import RenderableType

if TYPE_CHECKING:
    from rich.table import Table

HELP = "live per-station figures in the terminal"

DESCRIPTION = """Show, several times a second, what each station on the bus is doing: requests,
answers, late answers, timeouts, exceptions, CRC failures and response times, judged against
the master's timeout in use (given with --timeout, else inferred from the traffic so far, as
'analyze' infers it). Listen-only, as 'record'; with -o it records the same traffic to a
capture file at the same time.

The figures are those 'analyze' gives on the same bytes: after Ctrl-C the final figures are
drawn once more, equal to 'analyze' of the capture written with -o. A frame counts once the
bus has been quiet after it; when the bus stays quiet longer than the master waits, the last
poll is counted without waiting for the next one."""

#: ``7=Pump drive B,9=Dosing pump``: station names given on the command line.
_NAMES = re.compile(r"^\s*\d{1,3}\s*=\s*[^,=]+(?:,\s*\d{1,3}\s*=\s*[^,=]+)*\s*$")


def stations_arg(text: str):
    """``--stations``: a station map file (as ``analyze --stations``) or a list ``7=Pump drive B,9=Dosing``."""
    import os

    from buswitness.analysis.stationmap import StationInfo, StationMap

    if not os.path.lexists(text) and _NAMES.match(text):
        stations = {}
        for item in text.split(","):
            address, name = (x.strip() for x in item.split("=", 1))
            if not 0 <= int(address) <= 255:
                raise argparse.ArgumentTypeError(f"{address!r} is not a station address (1 to 247)")
            stations[int(address)] = StationInfo(int(address), visible(name))
        return StationMap(stations=stations)
    return text


def add_parser(sub: argparse._SubParsersAction) -> None:
    from buswitness.cli.cmd_analyze import timeout_arg

    p = sub.add_parser("watch", help=HELP, description=DESCRIPTION,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("ports", nargs="+", metavar="PORT", help="serial device or pyserial URL (one or two)")
    add_recording_options(p, output_required=False)
    p.add_argument("--duration", type=duration_s, default=None, help="stop after this long (default: Ctrl-C)")
    p.add_argument("--timeout", type=timeout_arg, default=None,
                   help="the master's response timeout, e.g. 200ms (a bare number is ms); default: inferred from "
                        "the traffic so far and shown as inferred")
    p.add_argument("--stations", type=stations_arg, default=None, metavar="TOML|LIST",
                   help='station names: a station map file as for analyze ([stations.7] name = "Pump drive B") or '
                        'a list, e.g. "7=Pump drive B,9=Dosing pump"')
    p.set_defaults(run=run)


def _ms(value: float | None) -> str:
    return "-" if value is None else f"{value:.1f}"


def timeout_text(timeout) -> str:
    """The master's timeout in use, and where it comes from, in a few words."""
    if timeout is None:
        return "master timeout: not known yet"
    if timeout.source == "given":
        return f"master timeout {timeout.timeout_ms:g} ms (given)"
    if timeout.timeout_ms is not None:
        return (f"master timeout about {timeout.timeout_ms:g} ms (inferred so far from {timeout.samples} "
                f"unanswered requests)")
    if timeout.source == "not used":
        return "master timeout: not used by this protocol"
    return "master timeout not inferred yet (too few unanswered requests; --timeout sets it)"


#: Column headings, short enough for an 80-column terminal; the legend under the table spells them out.
COLUMNS = ("station", "req.", "answ.", "late", "t/out", "exc.", "CRC", "last", "p50", "p95")
LEGEND = ("req. requests, answ. answered in time, late answered after the timeout, t/out timeouts, exc. exception "
          "answers, CRC failed CRC; last, p50, p95: response times in ms")


def fitted_table(console, live, rec: Recorder | None = None, notes: list[str] | None = None) -> RenderableType:
    """The live table cut to one line less than the terminal, so a redraw never scrolls it.

    A view taller than the terminal cannot be erased above the top line: its first lines would stay
    in the scrollback at every redraw. The legend goes first, then the rows that do not fit.
    """
    height = max(5, console.size.height - 1)
    table = station_table(live, rec, notes)
    if len(console.render_lines(table, pad=False)) <= height:
        return table
    table = station_table(live, rec, notes, legend=False)
    over = len(console.render_lines(table, pad=False)) - height
    if over <= 0:
        return table
    return station_table(live, rec, notes, legend=False, max_rows=max(0, table.row_count - over - 1))


def station_table(live, rec: Recorder | None = None, notes: list[str] | None = None,
                  final: bool = False, legend: bool = True, max_rows: int | None = None) -> Table:
    """The table: one row per station (the analysis's figures); the timeout in use on top, ports and notes under."""
    from rich import box
    from rich.table import Table

    result = getattr(live, "result", None)
    head = "stations: final figures" if final else "stations (live)"
    lines = [LEGEND] if legend else []
    if rec is not None:
        elapsed = elapsed_s(rec)
        head += f", {_hms(elapsed)}"
        for s in rec.stats:
            rate = f", {s.bytes / elapsed:.0f} B/s" if elapsed > 0 else ""
            state = " (gone, retrying)" if not s.connected else ""
            lines.append(visible(f"{s.name}: {s.bytes} B{rate}{state}"))
    if live is not None and getattr(live, "disabled_reason", None):
        lines.append(visible(live.disabled_reason))
    lines.extend(visible(n) for n in notes or [])
    title = f"{head}; {timeout_text(result.timeout if result is not None else None)}"
    table = Table(title=title, title_justify="left", caption="\n".join(lines), caption_justify="left",
                  box=box.SIMPLE_HEAD, pad_edge=False, padding=(0, 1))
    for col in COLUMNS:
        if col == "station":
            table.add_column(col, justify="left", no_wrap=True, overflow="ellipsis", max_width=24)
        else:
            table.add_column(col, justify="right", no_wrap=True)
    if result is None:
        return table
    last = {st.station: st.last_response_ms for st in live.rolling.rows()}
    rows = [st for st in result.stations
            if st.requests or st.crc_errors or st.answered or st.address in result.station_map.stations]
    # (an address seen only in noise has no row; a named station keeps one, even unheard)
    if max_rows is not None and len(rows) > max_rows:
        table.caption = (f"... {len(rows) - max_rows} more stations below (a taller terminal shows them)\n"
                         + str(table.caption or ""))
        rows = rows[:max_rows]
    for st in rows:
        table.add_row(visible(st.label), str(st.requests), str(st.answered), str(st.late), str(st.timeouts),
                      str(st.exceptions), str(st.crc_errors), _ms(last.get(st.address)), _ms(st.response_ms["p50"]),
                      _ms(st.response_ms["p95"]))
    return table


def _hms(seconds: float) -> str:
    s = int(seconds)
    return f"{s // 3600:d}:{s // 60 % 60:02d}:{s % 60:02d}"


def make_live(header, args: argparse.Namespace):
    """The live analysis of this header with the options given, or None when this build has no decoder."""
    try:  # (made by the main thread; the recorder's writer thread only queues records: LiveFigures)
        from buswitness.analysis.live import LiveAnalysis
        return LiveAnalysis(header, timeout_ms=args.timeout, station_map=_station_map(args))
    except Exception:  # noqa: BLE001 -- the live figures are a convenience: never stop a recording for them
        return None


def _station_map(args: argparse.Namespace):
    value = getattr(args, "stations", None)
    if value is None or not isinstance(value, str):
        return value
    from buswitness.analysis.stationmap import load_station_map
    return load_station_map(value)


def run(args: argparse.Namespace) -> int:
    from rich.console import Console
    from rich.live import Live

    if isinstance(args.stations, str):
        args.stations = _station_map(args)  # read now: a wrong path is refused before the port is opened
    cfg = config_from_args(args, args.ports)
    console = Console(stderr=True)
    live_view = sys.stdout.isatty()
    out = Console() if live_view else Console(width=120)
    warnings: list[str] = []

    showing: list = []  # the live view while it is on the screen

    def message(text: str) -> None:
        # While the live view is on the screen, through its own console: it prints above the view and
        # redraws the view below (another stream's text would leave pieces of the view in the scrollback).
        target = showing[0].console if showing else console
        target.print(visible(text, keep_newlines=True), markup=False, highlight=False, soft_wrap=True)

    rec = Recorder(cfg, on_message=message)
    tap = LiveFigures(rec, lambda header: make_live(header, args))
    rec.tap = tap.tap
    silence = silence_check(args, cfg)
    said: list[bool] = []

    def update() -> None:
        tap.update(time.monotonic_ns())
        if tap.decoder is None and tap.tried and not said:
            said.append(True)
            message("the decoder is not available in this build: only byte counts are shown")
        for text in silence.check(elapsed_s(rec), [s.bytes for s in rec.stats], tap.valid_frames):
            warnings.append(text)
            message(f"warning: {text}")

    def table(final: bool = False) -> RenderableType:
        if final:
            return station_table(tap.decoder, rec, final=True)
        return fitted_table(out, tap.decoder, rec, warnings[-2:])

    try:
        if live_view:
            # Started after the port's opening messages; transient: the live area is cleared at the end and
            # the final table printed once, so the scrollback holds one table, not a title per redraw.
            view = Live(console=out, auto_refresh=False, transient=True, vertical_overflow="crop")

            def refresh() -> None:
                update()
                if not view.is_started:
                    view.start()
                    showing.append(view)
                view.update(table(), refresh=True)

            try:
                run_recorder(rec, args.duration, refresh, period_s=0.25)
            finally:
                showing.clear()
                view.stop()
        else:
            run_recorder(rec, args.duration, update, period_s=0.25)
    finally:
        tap.finish()
        if rec.writer is not None:
            out.print(table(final=True))
            closing = silence.closing(elapsed_s(rec), [s.bytes for s in rec.stats], tap.valid_frames)
            message(summary(rec, closing))
    return 0

