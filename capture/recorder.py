"""Live recording: one reader thread per port, one writer thread owning the capture file.

A reader thread only waits for input, reads what is there, takes ``time.monotonic_ns()``
as the read returns and hands ``(port, t_ns, bytes)`` to an unbounded queue; it never
touches the disk, so a slow disk cannot delay a read. The writer thread undoes the PARMRK
escaping, appends records and ticks the :class:`CaptureWriter` (a block and an fsync at
least every second, so a hard kill loses at most the last second). When a port goes away
the reader marks the gap, retries every second (by path, or by the adapter's USB serial
number if the path moved), marks the reopening and carries on in the same capture.
"""

from __future__ import annotations

import os
import queue
import select
import shutil
import tempfile
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import serial
from buswitness.capture import serialport
from buswitness.capture.fileformat import (
    FLAG_DISCONNECTED,
    FLAG_LOST,
    FLAG_REOPENED,
    CaptureHeader,
    CaptureWriter,
    PortInfo,
)
from buswitness.capture.parmrk import ParmrkParser
from buswitness.errors import DeviceError, OutputError
from buswitness.serial import SerialFormat

#: Queue memory cap: beyond this many unwritten bytes, new reads are dropped and marked lost.
DEFAULT_QUEUE_CAP_BYTES = 64 << 20

Tap = Callable[[int, int, bytes, int], None]



def _still_in_place(path: Path, fd: int) -> bool:
    """True when ``path`` still names the file open on ``fd`` (it was not removed or replaced)."""
    try:
        return os.stat(path).st_ino == os.fstat(fd).st_ino
    except OSError:
        return False

@dataclass
class PortStats:
    """Running figures of one port for the status line and the summary."""

    name: str
    bytes: int = 0
    reads: int = 0
    records: int = 0
    line_errors: int = 0
    breaks: int = 0
    disconnects: int = 0
    reopens: int = 0
    lost_reads: int = 0
    connected: bool = True
    last_error: str = ""


@dataclass
class RecorderConfig:
    """What to record and how; the CLI fills it from its options."""

    devices: list[str]
    bus: SerialFormat
    output: Path | None  #: None: decode live only, keep nothing (``watch`` without ``-o``)
    rotate_bytes: int | None = None
    rotate_ns: int | None = None
    notes: str = ""
    low_latency: bool = False
    overwrite: bool = False
    read_timeout_s: float = 0.2
    reopen_interval_s: float = 1.0
    queue_cap_bytes: int = DEFAULT_QUEUE_CAP_BYTES
    sysfs_root: str = "/sys"
    flush_interval_s: float = 1.0
    fsync_interval_s: float = 1.0
    extra: dict = field(default_factory=dict)


class _NoFile:
    """Stands in for the capture writer when nothing is to be kept: counts, stores nothing."""

    def __init__(self, header: CaptureHeader) -> None:
        self.header = header
        self.parts: list[Path] = []
        self.records_written = 0
        self.bytes_written = 0
        self.last_t_ns: int | None = None

    def append(self, port: int, t_ns: int, data: bytes = b"", flags: int = 0) -> None:
        self.records_written += 1
        self.bytes_written += len(data)
        self.last_t_ns = t_ns

    def tick(self) -> None:
        """Nothing to flush."""

    def close(self) -> None:
        """Nothing to close."""


class _Reader(threading.Thread):
    """Reads one port and hands every chunk on with its read-return time; reopens after a loss."""

    def __init__(self, rec: Recorder, port_id: int, opened: serialport.OpenedPort) -> None:
        super().__init__(name=f"buswitness-reader-{port_id}", daemon=True)
        self.rec = rec
        self.port_id = port_id
        self.opened: serialport.OpenedPort | None = opened
        self.device = opened.device
        self.serial_number = opened.serial_number

    def run(self) -> None:
        rec, pid = self.rec, self.port_id
        stats = rec.stats[pid]
        while not rec.stopping.is_set():
            port = self.opened
            if port is None:
                self._try_reopen()
                continue
            ser = port.serial
            try:
                data = self._read(ser)
            except (serial.SerialException, OSError, TypeError, AttributeError) as exc:
                t = time.monotonic_ns()
                if rec.stopping.is_set():
                    break
                port.close()
                self.opened = None
                stats.connected = False
                stats.disconnects += 1
                stats.last_error = f"port went away ({_short(exc)}); retrying every {rec.cfg.reopen_interval_s:g} s"
                rec.hand_off(pid, t, b"", FLAG_DISCONNECTED, control=True)
                rec.message(f"{self.device}: {stats.last_error}")
                continue
            t = time.monotonic_ns()
            if data:
                rec.hand_off(pid, t, data)
        if self.opened is not None:
            self.opened.close()

    def _read(self, ser: serial.SerialBase) -> bytes:
        """Block until input arrives (or the short timeout), then read what is waiting."""
        fd = getattr(ser, "fd", None)
        if fd is not None:
            ready, _, _ = select.select([fd], [], [], self.rec.cfg.read_timeout_s)
            if not ready:
                return b""
            waiting = ser.in_waiting
            # Readable with nothing waiting: pyserial's read raises "readiness ... no data" (unplugged).
            return ser.read(max(1, waiting))
        return ser.read(max(1, ser.in_waiting))

    def _try_reopen(self) -> None:
        rec, pid = self.rec, self.port_id
        if rec.stopping.wait(rec.cfg.reopen_interval_s):
            return
        candidates = [self.device]
        if self.serial_number:
            moved = serialport.find_by_serial_number(self.serial_number)
            if moved and moved not in candidates:
                candidates.append(moved)
        for device in candidates:
            try:
                opened = rec.open_port(device, announce=False)
            except DeviceError:
                continue
            t = time.monotonic_ns()
            stats = rec.stats[pid]
            stats.connected = True
            stats.reopens += 1
            where = "" if device == self.device else f" (now at {device})"
            stats.last_error = f"reopened after a gap{where}"
            self.opened = opened
            rec.hand_off(pid, t, b"", FLAG_REOPENED, control=True)
            rec.message(f"{self.device}: reopened{where}; the gap is marked in the capture")
            return


def _short(exc: BaseException) -> str:
    text = str(exc) or type(exc).__name__
    return text.splitlines()[0][:120]


class Recorder:
    """Record one or more ports into one capture until :meth:`stop` is called.

    ``start`` opens every port (raising :class:`DeviceError` if one cannot be opened) and
    creates the file (raising :class:`OutputError`); afterwards a fatal output problem is
    kept in ``error`` and ends the recording. ``tap`` sees every record as it is written
    (from the writer thread), e.g. to feed a live decoder.
    """

    def __init__(self, cfg: RecorderConfig, *, on_message: Callable[[str], None] | None = None,
                 tap: Tap | None = None) -> None:
        self.cfg = cfg
        self.on_message = on_message
        self.tap = tap
        self.stopping = threading.Event()
        self.finished = threading.Event()
        self.error: OutputError | None = None
        self.stats = [PortStats(d) for d in cfg.devices]
        self.writer: CaptureWriter | None = None
        self.start_ns = 0
        self.notes: list[str] = []
        self._queue: queue.SimpleQueue = queue.SimpleQueue()
        self._queued_bytes = 0
        self._lock = threading.Lock()
        self._lost_pending = [False] * len(cfg.devices)
        self._readers: list[_Reader] = []
        self._writer_thread: threading.Thread | None = None
        self._parsers: list[ParmrkParser | None] = []
        self._watch: list[tuple[Path, int]] = []
        self._output_gone = False

    # -- messages and hand-off --------------------------------------------------------------
    def message(self, text: str) -> None:
        self.notes.append(text)
        if self.on_message:
            self.on_message(text)

    def hand_off(self, port: int, t_ns: int, data: bytes, flags: int = 0, control: bool = False) -> None:
        """Queue one read (called by reader threads); drops and marks data above the memory cap."""
        n = len(data)
        with self._lock:
            if not control and self._queued_bytes + n > self.cfg.queue_cap_bytes:
                self._lost_pending[port] = True
                self.stats[port].lost_reads += 1
                return
            if self._lost_pending[port]:
                flags |= FLAG_LOST
                self._lost_pending[port] = False
            self._queued_bytes += n
        self._queue.put((port, t_ns, data, flags, control))

    # -- opening ----------------------------------------------------------------------------
    def open_port(self, device: str, announce: bool = True) -> serialport.OpenedPort:
        """Open one port with the recorder's settings, error marking and latency handling."""
        port = serialport.open_listening(device, self.cfg.bus, read_timeout_s=self.cfg.read_timeout_s)
        latency = serialport.read_latency_ms(device, self.cfg.sysfs_root)
        if self.cfg.low_latency:
            value, text = serialport.set_low_latency(device, self.cfg.sysfs_root)
            if value is None:
                text = self._pyserial_low_latency(port) or text
            else:
                latency = value
            if announce:
                port.notes.append(text)
        if latency is not None:
            port.latency_ms, port.latency_source = float(latency), "sysfs"
            if latency > serialport.LATENCY_WARN_MS and announce:
                port.notes.append(
                    f"{device}: the adapter's latency timer is {latency} ms, so response times will be coarse "
                    f"(about ±{latency} ms); --low-latency sets it to 1 ms")
        port.serial_number = serialport.usb_serial_number(device)
        return port

    @staticmethod
    def _pyserial_low_latency(port: serialport.OpenedPort) -> str | None:
        setter = getattr(port.serial, "set_low_latency_mode", None)
        if setter is None:
            return None
        try:
            setter(True)
        except (OSError, ValueError, serial.SerialException) as exc:
            return (f"{port.device}: the driver refused the low-latency flag ({_short(exc)}); "
                    f"timing keeps the adapter's own granularity")
        return f"{port.device}: low-latency flag set through the serial driver"

    def start(self) -> None:
        """Open the ports and the file, then start the threads."""
        opened: list[serialport.OpenedPort] = []
        try:
            for device in self.cfg.devices:
                opened.append(self.open_port(device))
        except DeviceError:
            for p in opened:
                p.close()
            raise
        infos = [PortInfo(i, p.device, p.latency_ms, p.latency_source, p.serial_number, p.line_errors)
                 for i, p in enumerate(opened)]
        extra = dict(self.cfg.extra)
        extra["opened_format"] = {p.device: p.opened_format.short_form for p in opened}
        extra["listen_only"] = True
        header = CaptureHeader.new(self.cfg.bus, infos, notes=self.cfg.notes, source="record", extra=extra)
        if self.cfg.output is None:
            self.writer = _NoFile(header)  # type: ignore[assignment]
        else:
            self._create_file(header, opened)
        self.start_ns = header.start_monotonic_ns
        self._parsers = [ParmrkParser() if p.parmrk else None for p in opened]
        self._watch_current_part()
        for p in opened:
            for note in p.notes:
                self.message(note)
        self._writer_thread = threading.Thread(target=self._write_loop, name="buswitness-writer", daemon=True)
        self._writer_thread.start()
        for i, p in enumerate(opened):
            reader = _Reader(self, i, p)
            self._readers.append(reader)
            reader.start()

    def _create_file(self, header: CaptureHeader, opened: list[serialport.OpenedPort]) -> None:
        assert self.cfg.output is not None
        try:
            self.writer = CaptureWriter(self.cfg.output, header, rotate_bytes=self.cfg.rotate_bytes,
                                        rotate_ns=self.cfg.rotate_ns, flush_interval_s=self.cfg.flush_interval_s,
                                        fsync_interval_s=self.cfg.fsync_interval_s, overwrite=self.cfg.overwrite)
        except OutputError:
            for p in opened:
                p.close()
            raise

    def stop(self) -> None:
        """Ask every thread to finish; the writer drains the queue and closes the file."""
        self.stopping.set()

    def wait(self, timeout: float | None = None) -> bool:
        """Wait until the writer has closed the file; True when it has."""
        return self.finished.wait(timeout)

    def join(self) -> None:
        """Stop, wait for the readers and the writer, and raise a fatal output error if there was one."""
        self.stop()
        for r in self._readers:
            r.join(timeout=5)
        if self._writer_thread is not None:
            self._writer_thread.join()
        if self.error is not None:
            raise self.error

    @property
    def current_part(self) -> Path | None:
        return self.writer.parts[-1] if self.writer and self.writer.parts else None

    @property
    def queued_bytes(self) -> int:
        return self._queued_bytes

    # -- writer thread --------------------------------------------------------------------------
    def _write_loop(self) -> None:
        w = self.writer
        assert w is not None
        last_check = time.monotonic()
        try:
            while True:
                readers_done = self.stopping.is_set() and not any(r.is_alive() for r in self._readers)
                try:
                    item = self._queue.get(timeout=0.1)
                except queue.Empty:
                    item = None
                    if readers_done:
                        break
                while item is not None:
                    self._write_item(w, item)
                    try:
                        item = self._queue.get_nowait()
                    except queue.Empty:
                        item = None
                parts_before = len(w.parts)
                w.tick()
                if len(w.parts) != parts_before:
                    self._watch_current_part()
                now = time.monotonic()
                if now - last_check >= 1.0:
                    last_check = now
                    self._check_output_still_there()
            for pid, parser in enumerate(self._parsers):
                if parser is not None:
                    for data, flags in parser.flush():
                        w.append(pid, w.last_t_ns or time.monotonic_ns(), data, flags)
            w.close()
        except OutputError as exc:
            self.error = exc
            self.stopping.set()
            self._close_after_failure(w)
        finally:
            for _, fd in self._watch:
                os.close(fd)
            self._watch.clear()
            self.finished.set()

    def _write_item(self, w: CaptureWriter, item: tuple) -> None:
        pid, t_ns, data, flags, control = item
        stats = self.stats[pid]
        parser = self._parsers[pid]
        with self._lock:
            self._queued_bytes -= len(data)
        if control:
            if parser is not None:
                for d, f in parser.flush():
                    self._append(w, pid, t_ns, d, f)
            self._append(w, pid, t_ns, b"", flags)
            return
        stats.reads += 1
        if parser is None:
            self._append(w, pid, t_ns, data, flags)
            return
        for d, f in parser.feed(data):
            self._append(w, pid, t_ns, d, f | flags)
            flags = 0
        if flags:  # a read that was all escape prefix still carries its marker
            self._append(w, pid, t_ns, b"", flags)

    def _append(self, w: CaptureWriter, pid: int, t_ns: int, data: bytes, flags: int) -> None:
        w.append(pid, t_ns, data, flags)
        stats = self.stats[pid]
        stats.records += 1
        stats.bytes += len(data)
        if flags & 0x01:
            stats.line_errors += 1
        if flags & 0x02:
            stats.breaks += 1
        if self.tap is not None:
            self.tap(pid, t_ns, data, flags)

    # -- the output file disappearing -----------------------------------------------------------
    def _watch_current_part(self) -> None:
        """Keep a read handle on the current part so its bytes can be rescued if the directory goes."""
        part = self.current_part
        if part is None:
            return
        try:
            fd = os.open(part, os.O_RDONLY)
        except OSError:
            return
        for _, old in self._watch:
            os.close(old)
        self._watch = [(part, fd)]

    def _check_output_still_there(self) -> None:
        if not self._watch:
            return
        part, fd = self._watch[0]
        if not _still_in_place(part, fd):
            self._output_gone = True
            raise OutputError(f"{part}: the capture file or its directory was removed while recording; "
                              f"recording stopped")

    def _close_after_failure(self, w: CaptureWriter) -> None:
        """After a fatal output error: keep what is on disk valid and rescue a removed file.

        The writer is not flushed again: a second attempt on a full disk could leave a torn
        block after the cut-off one, and the reader recovers a cut-off block's whole records.
        A removed file is still open and writable, so its last records are flushed before the rescue.
        """
        if self._output_gone:
            try:
                w.close()
            except OutputError:
                pass
        if not self._watch or self.error is None:
            return
        part, fd = self._watch[0]
        if _still_in_place(part, fd):
            return
        rescue = Path(tempfile.gettempdir()) / f"{part.stem}.rescued-{os.getpid()}{part.suffix}"
        try:
            out = os.open(rescue, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
            with os.fdopen(out, "wb") as dst, os.fdopen(os.dup(fd), "rb") as src:
                src.seek(0)
                shutil.copyfileobj(src, dst)
                dst.flush()
                os.fsync(dst.fileno())
        except OSError as exc:
            self.error = OutputError(f"{self.error}; the recorded data could not be rescued ({exc.strerror})")
            return
        self.error = OutputError(f"{self.error}; everything recorded in that part was saved to {rescue}")
