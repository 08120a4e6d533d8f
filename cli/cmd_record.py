"""``buswitness record``: record a bus to a capture file through a serial adapter (listen-only)."""

from __future__ import annotations

import argparse
import os
import re
import signal
import sys
import threading
import time
from collections.abc import Callable
from datetime import datetime, timedelta
from pathlib import Path
from typing import TYPE_CHECKING, Any

from buswitness.capture.recorder import Recorder, RecorderConfig
from buswitness.cli.common import (
    DEFAULT_SERIAL,
    add_protocol_option,
    add_serial_options,
    check_port,
    duration_s,
    roles_arg,
    serial_from_args,
    size_bytes,
)
from buswitness.cli.silence import SILENCE_WINDOW_S, SilenceCheck
from buswitness.errors import OutputError, UsageError
from buswitness.fsutil import check_output_path
from buswitness.serial import SerialFormat
from buswitness.textsafe import visible
from rich.console import RenderableType

if TYPE_CHECKING:
    from buswitness.analysis.rolling import LiveDecoder

HELP = "record a bus to a capture file through a serial adapter (listen-only)"

DESCRIPTION = f"""Record everything one or two serial adapters receive into one capture file,
with a host timestamp for every read, until --duration or --until, or Ctrl-C.

The port is opened at {DEFAULT_SERIAL.baud} baud, {DEFAULT_SERIAL.short_form} (the Modbus RTU default) unless --baud and
--format say otherwise; 'buswitness detect PORT' finds a bus's setting.

Listen-only: buswitness never writes to the port, and asks the driver to leave RTS and DTR
deasserted so a transceiver wired to them is not keyed (some drivers raise DTR/RTS when any
program opens the port; wire the adapter's receiver only if that matters).

The capture is written in blocks at least once a second and synced to disk, so a power
loss costs at most the last second. If an adapter disappears the gap is marked and the
port is reopened (by path, or by USB serial number) when it comes back."""

_UNTIL = re.compile(r"^\s*(\d{1,2}):(\d{2})(?::(\d{2}))?\s*$")


def until_arg(text: str) -> str:
    if not _UNTIL.match(text):
        raise argparse.ArgumentTypeError(f"{text!r} is not a time of day (e.g. 07:00 or 06:30:00)")
    h, m, s = (int(x or 0) for x in _UNTIL.match(text).groups())  # type: ignore[union-attr]
    if h > 23 or m > 59 or s > 59:
        raise argparse.ArgumentTypeError(f"{text!r} is not a time of day (00:00 to 23:59)")
    return text


def until_instant(text: str, now: datetime | None = None) -> datetime:
    """The next moment the site's local clock shows ``text`` (this machine's time zone, TZ), as an aware time.

    A naive ``now`` is read as local time. The target is built on the local calendar and given its own
    UTC offset, so a night across a daylight-saving change still stops when the wall clock says.
    """
    h, m, s = (int(x or 0) for x in _UNTIL.match(text).groups())  # type: ignore[union-attr]
    now = now or datetime.now().astimezone()
    local_now = now.astimezone() if now.tzinfo else now
    naive = local_now.replace(tzinfo=None)
    target = naive.replace(hour=h, minute=m, second=s, microsecond=0)
    if target <= naive:
        target += timedelta(days=1)
    return target.astimezone()  # a naive time is local time: this gives it the offset it has then


def seconds_until(text: str, now: datetime | None = None) -> float:
    """Seconds from ``now`` to the next time the local clock shows ``text``."""
    now = now or datetime.now().astimezone()
    aware_now = now if now.tzinfo else now.astimezone()
    return (until_instant(text, now) - aware_now).total_seconds()


#: Shortest rotation: a part per minute is already 1440 files a day; shorter makes a file per block.
MIN_ROTATE_S = 60.0
#: Smallest rotated part (1 MB): smaller parts are mostly header and index (common practice).
MIN_ROTATE_BYTES = 1_000_000
_ROTATE_TIME = re.compile(r"^\s*(?:\d+(?:\.\d+)?\s*[smhd]\s*)+$", re.IGNORECASE | re.ASCII)
_ROTATE_SIZE = re.compile(r"^\s*\d+(?:\.\d+)?\s*(?:B|KB|MB|GB|KiB|MiB|GiB)\s*$", re.IGNORECASE | re.ASCII)


def rotate_arg(text: str) -> tuple[str, int]:
    """``--rotate 1h`` (capture time) or ``--rotate 200MB`` (file size); the unit is required."""
    if _ROTATE_SIZE.match(text):
        value = size_bytes(text)
        if value < MIN_ROTATE_BYTES:
            raise argparse.ArgumentTypeError(f"{text!r}: a part must be at least 1MB (or rotate by time, e.g. 1h)")
        return "bytes", value
    if _ROTATE_TIME.match(text):
        seconds = duration_s(text)
        if seconds < MIN_ROTATE_S:
            raise argparse.ArgumentTypeError(f"{text!r}: rotate at most once a minute (at least 1m, e.g. 1h)")
        return "time", int(seconds * 1e9)
    raise argparse.ArgumentTypeError(f"{text!r} needs a unit: a duration such as 1h or 30m, or a size such as "
                                     f"200MB or 1GiB")


def add_recording_options(p: argparse.ArgumentParser, output_required: bool) -> None:
    """Options shared by ``record`` and ``watch``."""
    add_serial_options(p, from_file=False)
    add_protocol_option(p, from_file=False)
    p.add_argument("-o", "--output", type=Path, required=output_required, default=None,
                   help="capture file to write (e.g. night.bwcap); never overwritten")
    p.add_argument("--rotate", type=rotate_arg, default=None, metavar="TIME|SIZE",
                   help="start a new numbered part every so much capture time (1h, at least 1m) or file size "
                        "(200MB, at least 1MB); the unit is required")
    p.add_argument("--note", default="", help="free text kept in the capture header, e.g. 'pump station bus 2'")
    p.add_argument("--low-latency", action="store_true",
                   help="set the USB adapter's latency timer to 1 ms (Linux; needs root or a udev rule)")
    # How long without bytes or valid frames before the warning: internal, so tests need not wait a minute.
    p.add_argument("--silence-window", type=duration_s, default=SILENCE_WINDOW_S, help=argparse.SUPPRESS)
    p.add_argument("--roles", type=roles_arg, default=None, metavar="ROLE[,ROLE]",
                   help="what each port hears, in port order: 'master' (only the master's pair), 'slaves' "
                        "(only the stations' pair) or 'both' (a two-wire bus, the default); e.g. "
                        "--roles master,slaves for a four-wire bus")


def add_parser(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("record", help=HELP, description=DESCRIPTION,
                       formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("ports", nargs="+", metavar="PORT",
                   help="serial device (/dev/ttyUSB0, /dev/serial/by-id/...) or pyserial URL; two for a "
                        "four-wire bus or one adapter per direction")
    add_recording_options(p, output_required=True)
    stop = p.add_mutually_exclusive_group()
    stop.add_argument("--duration", type=duration_s, default=None, help="stop after this long (e.g. 12h)")
    stop.add_argument("--until", type=until_arg, default=None, metavar="HH:MM",
                      help="stop the next time the clock shows this time of day, in the site's local time (this "
                           "machine's time zone, the TZ of the reports' local times; the capture keeps UTC), "
                           "e.g. 07:00")
    p.add_argument("--quiet", action="store_true", help="no status line, only errors and the summary")
    p.set_defaults(run=run)


def config_from_args(args: argparse.Namespace, ports: list[str]) -> RecorderConfig:
    if len(ports) > 2:
        raise UsageError("record takes one or two ports (one per wire pair or direction)")
    for port in ports:
        check_port(port)
    check_distinct_adapters(ports)
    if args.output is not None:
        if os.path.lexists(args.output):
            raise OutputError(f"{args.output}: already exists; choose another output name (nothing was overwritten)")
        check_output_path(args.output, "-o")
    bus = serial_from_args(args, SerialFormat())
    assert bus is not None
    cfg = RecorderConfig(devices=list(ports), bus=bus, output=args.output, notes=args.note,
                         low_latency=args.low_latency)
    if getattr(args, "roles", None):
        if len(args.roles) != len(ports):
            raise UsageError(f"--roles names {len(args.roles)} role(s) for {len(ports)} port(s); give one per port")
        # The decoder reads these to take direction from the port (docs/capture-format.md, header extra).
        cfg.extra["port_roles"] = {str(i): role for i, role in enumerate(args.roles)}
    if getattr(args, "protocol", None):
        cfg.extra["protocol"] = args.protocol  # the decoder reads it (docs/capture-format.md, header extra)
    if args.rotate is not None:
        kind, value = args.rotate
        if kind == "bytes":
            cfg.rotate_bytes = value
        else:
            cfg.rotate_ns = value
    return cfg


def check_distinct_adapters(ports: list[str]) -> None:
    """Refuse one adapter named twice: the same path, a link and its node, or two nodes of one USB serial number."""
    from buswitness.capture import serialport

    seen: dict[str, str] = {}
    numbers: dict[str, str] = {}
    for port in ports:
        real = serialport.real_device(port)
        if real in seen:
            same = "the same port" if seen[real] == port else f"the same device as {seen[real]} ({real})"
            raise UsageError(f"{port}: is {same}; give each adapter once (two ports are two adapters, one per "
                             f"wire pair or direction)")
        seen[real] = port
        number = serialport.usb_serial_number(port)
        if number:
            if number in numbers:
                raise UsageError(f"{port}: is the same USB adapter as {numbers[number]} (serial number "
                                 f"{number}); give each adapter once")
            numbers[number] = port


def stop_after(args: argparse.Namespace) -> float | None:
    """Seconds to record, from --duration or --until (None: until stopped)."""
    if getattr(args, "duration", None):
        return float(args.duration)
    if getattr(args, "until", None):
        return seconds_until(args.until)
    return None


def run_recorder(rec: Recorder, seconds: float | None, refresh: Callable[[], None] | None = None,
                 period_s: float = 0.5) -> None:
    """Start ``rec``, run until the time is up, a signal arrives or the file fails; then close cleanly."""
    previous = {}

    def _stop(signum: int, frame: object) -> None:
        rec.stop()

    for sig in (signal.SIGINT, signal.SIGTERM):
        previous[sig] = signal.signal(sig, _stop)
    if hasattr(signal, "SIGXFSZ"):
        # Past a file-size limit, write() must fail with EFBIG (handled) rather than kill us.
        previous[signal.SIGXFSZ] = signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
    try:
        rec.start()
        deadline = None if seconds is None else time.monotonic() + seconds
        while not rec.stopping.is_set():
            wait = period_s if deadline is None else max(0.0, min(period_s, deadline - time.monotonic()))
            rec.stopping.wait(wait)
            if refresh is not None:
                refresh()
            if deadline is not None and time.monotonic() >= deadline:
                break
        rec.join()
    finally:
        rec.stop()
        for sig, handler in previous.items():
            signal.signal(sig, handler)


#: Records held for the live figures while their decoder is still being made (its imports take seconds).
MAX_EARLY_RECORDS = 200_000


def _live_decoder(header: object) -> LiveDecoder | None:
    from buswitness.analysis.rolling import LiveDecoder

    return LiveDecoder.create(header)


class LiveFigures:
    """The optional live decoder of a recording, made by the main thread once the header exists.

    The writer thread only queues records (:meth:`tap`): making the decoder imports the decoder and
    pandas, seconds that must never hold up writing and syncing the file. ``make`` builds the
    decoder from the capture header (``record``: rolling counts; ``watch``: the live analysis).
    """

    def __init__(self, rec: Recorder, make: Callable[[object], object | None] | None = None) -> None:
        self.rec = rec
        self.make = make or _live_decoder
        self.decoder: Any = None
        self.tried = False
        self._early: list[tuple[int, int, bytes, int]] = []
        self._lock = threading.Lock()

    def tap(self, port: int, t_ns: int, data: bytes, flags: int) -> None:
        """Recorder tap (writer thread): queue each record for the decoder; never waits on the decoder."""
        decoder = self.decoder
        if decoder is None:
            with self._lock:
                decoder = self.decoder
                if decoder is None:
                    if not self.tried and len(self._early) < MAX_EARLY_RECORDS:
                        self._early.append((port, t_ns, data, flags))
                    return
        decoder.add(port, t_ns, data, flags)

    def update(self, *args: object) -> None:
        """Main thread: make the decoder once the header exists, then decode what was queued."""
        if not self.tried and self.rec.writer is not None:
            made: Any = self.make(self.rec.writer.header)
            with self._lock:
                if made is not None:
                    for record in self._early:
                        made.add(*record)
                self._early = []
                self.decoder = made
                self.tried = True
        if self.decoder is not None:
            self.decoder.update(*args)

    def finish(self) -> None:
        self.update()
        if self.decoder is not None:
            self.decoder.finish()

    @property
    def valid_frames(self) -> int | None:
        """Valid frames decoded so far (None: no decoder in this build, or it stopped)."""
        if self.decoder is None:
            return 0 if not self.tried else None
        if self.decoder.disabled_reason is not None:
            return None
        frames = getattr(self.decoder, "valid_frames", None)
        return frames if frames is not None else sum(st.frames for st in self.decoder.figures.rows())


def silence_check(args: argparse.Namespace, cfg: RecorderConfig) -> SilenceCheck:
    """The no-bytes / no-valid-frames check of a recording, at the bus setting it listens at."""
    return SilenceCheck(list(cfg.devices), f"{cfg.bus.baud} {cfg.bus.short_form}",
                        window_s=getattr(args, "silence_window", SILENCE_WINDOW_S))


def elapsed_s(rec: Recorder) -> float:
    return (time.monotonic_ns() - rec.start_ns) / 1e9 if rec.start_ns else 0.0


def summary(rec: Recorder, closing: list[str] | None = None) -> str:
    """What was recorded, per port, for the last lines printed; ``closing``: the silence check's lines."""
    w = rec.writer
    elapsed = (time.monotonic_ns() - rec.start_ns) / 1e9 if rec.start_ns else 0.0
    lines = []
    if w is not None:
        if w.parts:
            lines.append(f"recorded {w.bytes_written} bytes in {w.records_written} records over "
                         f"{_hms(elapsed)} into {', '.join(str(p) for p in w.parts)}")
        else:
            lines.append(f"received {w.bytes_written} bytes in {w.records_written} records over {_hms(elapsed)} "
                         f"(nothing kept: give -o FILE to record as well)")
    if w is not None and rec.error is not None:
        unwritten = sum(s.bytes for s in rec.stats) - w.bytes_written
        lines.append(f"at most {unwritten} byte(s) received after the last complete block are missing "
                     f"(lost to the output fault)")
    for s in rec.stats:
        extra = []
        if s.line_errors:
            extra.append(f"{s.line_errors} marked bytes")
        if s.breaks:
            extra.append(f"{s.breaks} breaks")
        if s.disconnects:
            extra.append(f"{s.disconnects} disconnects, {s.reopens} reopened")
        if s.lost_reads:
            extra.append(f"{s.lost_reads} reads LOST (writer fell behind)")
        tail = f" ({'; '.join(extra)})" if extra else ""
        lines.append(f"  {s.name}: {s.bytes} bytes, {s.reads} reads{tail}")
    lines.extend(closing or [])
    return visible("\n".join(lines), keep_newlines=True)  # port and file names come from outside


def _hms(seconds: float) -> str:
    s = int(seconds)
    return f"{s // 3600:d}:{s // 60 % 60:02d}:{s % 60:02d}"


def status_renderable(rec: Recorder, live_decoder: object | None = None) -> RenderableType:
    """The status line: elapsed, per-port bytes/records/rate, current part, last error, station counts."""
    from rich.table import Table
    from rich.text import Text

    elapsed = max(1e-9, (time.monotonic_ns() - rec.start_ns) / 1e9)
    grid = Table.grid(padding=(0, 2))
    part = rec.current_part
    grid.add_row(Text(f"recording {_hms(elapsed)}", style="bold"),
                 Text(visible(f"file {part.name if part else '-'}")))
    for s in rec.stats:
        state = "" if s.connected else "  [gone, retrying]"
        err = f"  last: {s.last_error}" if s.last_error else ""
        grid.add_row(Text(visible(s.name)),
                     Text(visible(f"{s.bytes} B  {s.records} rec  {s.bytes / elapsed:.0f} B/s{state}{err}")))
    figures = getattr(live_decoder, "figures", None)
    if figures is not None:
        for st in figures.rows():
            grid.add_row(Text(f"  station {st.station}"),
                         Text(f"{st.frames} frames  {st.crc_errors} CRC failures  {st.timeouts} timeouts"))
    reason = getattr(live_decoder, "disabled_reason", None)
    if reason:
        grid.add_row(Text(""), Text(visible(reason)))
    return grid


def run(args: argparse.Namespace) -> int:
    from rich.console import Console
    from rich.live import Live

    cfg = config_from_args(args, args.ports)
    console = Console(stderr=True)
    show_status = not args.quiet and sys.stderr.isatty()

    def message(text: str) -> None:
        console.print(visible(text, keep_newlines=True), markup=False, highlight=False, soft_wrap=True)

    rec = Recorder(cfg, on_message=message)
    figures = LiveFigures(rec)
    rec.tap = figures.tap  # the live decoder counts valid frames for the silence check, status line or not
    silence = silence_check(args, cfg)
    seconds = stop_after(args)
    if getattr(args, "until", None):
        from buswitness.cli.report_text import local_time

        message(f"recording until {local_time(until_instant(args.until))} (site local time)")

    def check() -> None:
        figures.update()
        for text in silence.check(elapsed_s(rec), [s.bytes for s in rec.stats], figures.valid_frames):
            message(f"warning: {text}")

    def closing() -> list[str]:
        figures.finish()
        return silence.closing(elapsed_s(rec), [s.bytes for s in rec.stats], figures.valid_frames)

    if show_status:
        live = Live(console=console, refresh_per_second=2, transient=True)

        def refresh() -> None:
            check()
            live.update(status_renderable(rec, figures.decoder))

        with live:
            try:
                run_recorder(rec, seconds, refresh)
            finally:
                message(summary(rec, closing()))
    else:
        try:
            run_recorder(rec, seconds, check)
        finally:
            if rec.writer is not None:
                message(summary(rec, closing()))
    return 0
