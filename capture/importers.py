"""Importers for plain inputs a user may already have: timestamped hex text and raw bytes.

Both yield the same :class:`RecordBatch` columns as a capture file, so everything after
this point does not care where the bytes came from.

Hex text::

    # comment lines start with '#'; optional settings:
    # baud: 19200
    # format: 8E1
    # latency_ms: 16
    12.004311 01 03 00 6B 00 03 74 17

Each line is one chunk: the time its *last* byte arrived, in seconds (relative to the
capture start, or UNIX epoch seconds), then its bytes in hex. Raw binary has no
timestamps at all; the baud rate and format come from the command line and frames are
later found by CRC alone.
"""

from __future__ import annotations

import os
import re
from collections.abc import Iterator
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path

import numpy as np
from buswitness.capture.fileformat import (
    FLAG_UNTIMED,
    MAX_SPAN_NS,
    CaptureHeader,
    PortInfo,
    ReadReport,
    RecordBatch,
)
from buswitness.errors import InputFileError, UsageError
from buswitness.serial import SerialFormat, parse_baud

#: Timestamps above this are taken as UNIX epoch seconds (1973-03-03), below as relative.
EPOCH_THRESHOLD_S = 1e8
#: Latest first time read as a calendar time (the end of year 9999, the last a date can show).
EPOCH_LIMIT_S = 253402300799.0
#: Largest time since the start a line may carry: one capture covers at most a year, as a capture file's
#: records do (fileformat.MAX_SPAN_NS); before, up to 292 years passed and made per-minute figures for them.
MAX_OFFSET_S = MAX_SPAN_NS / 1e9
#: Largest adapter latency a '# latency_ms:' line may give (the capture header allows the same).
MAX_LATENCY_MS = 10_000.0
BATCH_RECORDS = 16384
#: Longest line read: 65535 bytes in hex with spaces and a time (a longer one is a bad line, read no further).
MAX_LINE_CHARS = 256 * 1024
RAW_RECORD_BYTES = 256
#: Characters read at a time from a hex text file: the first read, doubling up to the most (a read
#: error loses what the failing read had read).
READ_CHARS = 8192
READ_CHARS_MOST = 1 << 20
_SETTING = re.compile(r"^#\s*(baud|format|latency_ms|port|notes)\s*:\s*(.*?)\s*$", re.IGNORECASE)
_HEX_TOKEN = re.compile(r"^(?:0x)?([0-9A-Fa-f]{2})+$")

ON_BAD_LINE = ("stop", "skip")
#: Skipped lines described one by one in the report; past this only the count grows.
MAX_LINE_WARNINGS = 20


@dataclass
class HexTextSource:
    """A timestamped hex-text file, read line by line."""

    path: Path
    serial: SerialFormat | None = None  # overrides the file's own '# baud:' / '# format:' lines
    on_bad_line: str = "stop"
    report: ReadReport = field(default_factory=ReadReport)

    def __post_init__(self) -> None:
        if self.on_bad_line not in ON_BAD_LINE:
            raise UsageError(f"--on-bad-line must be one of {', '.join(ON_BAD_LINE)}, not {self.on_bad_line!r}")
        self.path = Path(self.path)
        try:
            self.header = self._read_settings()
        except OSError as exc:
            raise InputFileError(self.path, f"cannot be read ({exc.strerror or exc.__class__.__name__})") from None
        self.paths = [self.path]
        self.report.files = [str(self.path)]

    def _open(self):
        if self.path.is_dir():
            raise InputFileError(self.path, "is a directory, not a hex text file")
        try:
            return open(self.path, encoding="utf-8", errors="replace", newline=None)
        except FileNotFoundError:
            raise InputFileError(self.path, "no such file") from None
        except OSError as exc:
            raise InputFileError(self.path, f"cannot be opened ({exc.strerror})") from None

    def _read_settings(self) -> CaptureHeader:
        baud, fmt, latency, port, notes = 19200, "8E1", None, str(self.path), ""
        first_t: float | None = None
        with self._open() as f:
            for lineno, line in _lines(f):
                s = line.strip()
                if not s:
                    continue
                if s.startswith("#"):
                    m = _SETTING.match(s)
                    if m:
                        key, value = m.group(1).lower(), m.group(2)
                        try:
                            if key == "baud":
                                baud = parse_baud(value)
                            elif key == "format":
                                fmt = SerialFormat.parse(value).short_form
                            elif key == "latency_ms":
                                ms = float(value)
                                if not 0 < ms <= MAX_LATENCY_MS:
                                    raise ValueError(f"latency {value!r} ms is not more than 0 and at most "
                                                     f"{MAX_LATENCY_MS:g}")
                                latency = ms
                            elif key == "port":
                                port = value
                            else:
                                notes = value
                        except (UsageError, ValueError) as exc:
                            if self.on_bad_line == "stop":
                                raise InputFileError(self.path, f"line {lineno}: bad setting ({exc})",
                                                     "fix the line, or pass --on-bad-line skip") from None
                            self.report.warnings.append(f"{self.path}: line {lineno}: bad setting ignored ({exc})")
                    continue
                try:
                    first_t = float(s.split()[0])
                except ValueError:
                    pass
                break
        serial = self.serial or SerialFormat.parse(fmt, baud)
        start_utc = ""
        self._epoch = first_t is not None and EPOCH_THRESHOLD_S < first_t <= EPOCH_LIMIT_S
        self._t0: float = float(first_t) if self._epoch and first_t is not None else 0.0
        if self._epoch and first_t is not None:
            start_utc = datetime.fromtimestamp(first_t, timezone.utc).isoformat(timespec="microseconds")
        return CaptureHeader(serial=serial, ports=[PortInfo(0, port, latency, "user" if latency else "unknown")],
                             start_utc=start_utc, start_monotonic_ns=0, source="import-hex", notes=notes,
                             capture_id=f"hex:{self.path.name}")

    def iter_batches(self) -> Iterator[RecordBatch]:
        t_list: list[int] = []
        lengths: list[int] = []
        payload = bytearray()
        last_t = -1
        with self._open() as f:
            blocks = _line_blocks(f)
            lineno = 0
            while True:
                try:
                    lines = next(blocks)
                except StopIteration:
                    break
                except OSError as exc:  # a failing medium (EIO): keep what was read, say where it stopped
                    reason = exc.strerror or exc.__class__.__name__
                    self.report.read_error = reason
                    self.report.warnings.append(
                        f"{self.path}: read error after line {lineno} ({reason}); "
                        f"the lines read before it are kept, the rest could not be read")
                    break
                whole = self._whole_block(lines, last_t)
                if whole is not None:
                    stamps, datas = whole
                    lineno += len(lines)
                    last_t = stamps[-1]
                    t_list += stamps
                    lengths += map(len, datas)
                    payload += b"".join(datas)
                else:
                    for line in lines:
                        lineno += 1
                        parsed = self._one_line(line, lineno, last_t)
                        if parsed is None:
                            continue
                        t_ns, data = parsed
                        last_t = t_ns
                        t_list.append(t_ns)
                        lengths.append(len(data))
                        payload += data
                while len(t_list) >= BATCH_RECORDS:
                    size = sum(lengths[:BATCH_RECORDS])
                    yield self._batch(t_list[:BATCH_RECORDS], lengths[:BATCH_RECORDS], payload[:size])
                    del t_list[:BATCH_RECORDS], lengths[:BATCH_RECORDS], payload[:size]
        if t_list:
            yield self._batch(t_list, lengths, payload)
        more = self.report.lines_skipped - MAX_LINE_WARNINGS
        if more > 0:
            self.report.warnings.append(f"{self.path}: {more} more malformed line{'s' if more != 1 else ''} "
                                        f"skipped ({self.report.lines_skipped} in all)")

    def _whole_block(self, lines: list[str], last_t: int) -> tuple[list[int], list[bytes]] | None:
        """Times (ns) and bytes of a block of lines when every one is a usual line, else None.

        A usual line is a number, then hex that bytes.fromhex takes whole, in time order and range.
        bytes.fromhex takes exactly what the token rules of _parse_line take (pairs of hex digits,
        ASCII blanks between pairs), so a block with any other line goes line by line, where
        _parse_line accepts the line or names the token at fault.
        """
        if not lines or max(map(len, lines)) > MAX_LINE_CHARS:
            return None
        rows = [line.split(None, 1) for line in lines]
        if min(map(len, rows)) < 2:
            return None
        try:
            seconds = np.array(list(map(float, [r[0] for r in rows])), dtype=np.float64)
            datas = list(map(bytes.fromhex, [r[1] for r in rows]))
        except ValueError:
            return None
        offset = seconds - self._t0
        if not (np.abs(offset) <= MAX_OFFSET_S).all() or max(map(len, datas)) > 65535:
            return None
        stamps = np.rint(offset * 1e9).astype(np.int64)  # as int(round(...)): nearest, ties to even
        if stamps[0] < last_t or (stamps[1:] < stamps[:-1]).any():
            return None
        return stamps.tolist(), datas

    def _one_line(self, line: str, lineno: int, last_t: int) -> tuple[int, bytes] | None:
        """One line's time (ns) and bytes; None for a blank, comment or bad line (reported)."""
        if len(line) > MAX_LINE_CHARS:
            self._bad_line(f"longer than {MAX_LINE_CHARS} characters", lineno, line[:MAX_LINE_CHARS])
            return None
        parts = line.split(None, 1)
        if not parts or parts[0][0] == "#":
            return None
        try:
            seconds = float(parts[0])
            data = bytes.fromhex(parts[1])
        except (ValueError, IndexError):
            data = b""
        if data and abs(seconds - self._t0) <= MAX_OFFSET_S and len(data) <= 65535:
            t_ns = int(round((seconds - self._t0) * 1e9))
            if t_ns >= last_t:
                return t_ns, data
        return self._parse_line(line.strip(), lineno, last_t)

    def _parse_line(self, s: str, lineno: int, last_t: int) -> tuple[int, bytes] | None:
        parts = s.split()
        problem = ""
        try:
            seconds = float(parts[0])
            if not np.isfinite(seconds):
                raise ValueError
        except ValueError:
            problem = f"the time {parts[0][:20]!r} is not a number of seconds"
            seconds = self._t0
        if not abs(seconds - self._t0) <= MAX_OFFSET_S:
            problem = f"the time {parts[0][:20]!r} is out of range (more than {MAX_OFFSET_S / 86400:.0f} days from the start)"
        if not problem:
            t_ns = int(round((seconds - self._t0) * 1e9))
            if t_ns < last_t:
                problem = "the time goes backwards"
            elif len(parts) < 2:
                problem = "no bytes after the time"
            else:
                data = bytearray()
                for tok in parts[1:]:
                    if not _HEX_TOKEN.match(tok):
                        problem = f"{tok[:20]!r} is not hex bytes"
                        break
                    data += bytes.fromhex(tok[2:] if tok[:2] in ("0x", "0X") else tok)
                if not problem:
                    if len(data) > 65535:
                        problem = "more than 65535 bytes on one line"
                    else:
                        return t_ns, bytes(data)
        self._bad_line(problem, lineno, s)
        return None

    def _bad_line(self, problem: str, lineno: int, s: str) -> None:
        message = f"line {lineno}: {problem}"
        if self.on_bad_line == "stop":
            raise InputFileError(self.path, message, "fix the line, or pass --on-bad-line skip to skip bad lines")
        self.report.lines_skipped += 1
        if self.report.lines_skipped <= MAX_LINE_WARNINGS:
            self.report.warnings.append(f"{self.path}: {message}; line skipped")
        self.report.bytes_skipped += len(s)
        return None

    def _batch(self, t_list: list[int], lengths: list[int], payload: bytearray) -> RecordBatch:
        n = len(t_list)
        self.report.records += n
        self.report.data_bytes += len(payload)
        self.report.blocks += 1
        return RecordBatch(np.array(t_list, dtype=np.int64), np.array(lengths, dtype=np.int64),
                           np.zeros(n, np.uint8), np.zeros(n, np.uint8),
                           np.frombuffer(bytes(payload), dtype=np.uint8).copy())


@dataclass
class RawBinarySource:
    """Raw bytes with no timestamps. Times are synthetic (bytes back to back) and flagged so."""

    path: Path
    serial: SerialFormat | None = None
    report: ReadReport = field(default_factory=ReadReport)

    def __post_init__(self) -> None:
        self.path = Path(self.path)
        if self.path.is_dir():
            raise InputFileError(self.path, "is a directory, not a raw capture")
        if not self.path.exists():
            raise InputFileError(self.path, "no such file")
        if self.serial is None:
            raise UsageError(f"{self.path}: raw bytes carry no settings; give --baud and --format (e.g. 19200 8E1)")
        self.header = CaptureHeader(serial=self.serial, ports=[PortInfo(0, str(self.path))], source="import-raw",
                                    timing="none", capture_id=f"raw:{self.path.name}")
        self.paths = [self.path]
        self.report.files = [str(self.path)]

    def iter_batches(self) -> Iterator[RecordBatch]:
        char_ns = self.serial.char_time_s * 1e9  # type: ignore[union-attr]
        done = 0
        try:
            f = open(self.path, "rb")
        except OSError as exc:
            raise InputFileError(self.path, f"cannot be opened ({exc.strerror})") from None
        with f:
            while True:
                try:
                    block = f.read(RAW_RECORD_BYTES * 4096)
                except OSError as exc:  # a failing medium (EIO): keep what was read, say where it stopped
                    reason = exc.strerror or exc.__class__.__name__
                    self.report.read_error = reason
                    self.report.warnings.append(f"{self.path}: read error after byte {done} ({reason}); the bytes "
                                                f"read before it are kept, the rest could not be read")
                    return
                if not block:
                    return
                n = len(block)
                lengths = np.full((n + RAW_RECORD_BYTES - 1) // RAW_RECORD_BYTES, RAW_RECORD_BYTES, dtype=np.int64)
                lengths[-1] = n - RAW_RECORD_BYTES * (len(lengths) - 1)
                ends = done + np.cumsum(lengths)
                t_ns = np.round(ends * char_ns).astype(np.int64)
                done += n
                self.report.records += len(lengths)
                self.report.data_bytes += n
                self.report.blocks += 1
                yield RecordBatch(t_ns, lengths, np.zeros(len(lengths), np.uint8),
                                  np.full(len(lengths), FLAG_UNTIMED, np.uint8),
                                  np.frombuffer(block, dtype=np.uint8).copy())


def _lines(f) -> Iterator[tuple[int, str]]:
    """Numbered lines of a text file, each as :func:`_line_blocks` gives it."""
    lineno = 0
    for block in _line_blocks(f):
        for line in block:
            lineno += 1
            yield lineno, line


def _line_blocks(f) -> Iterator[list[str]]:
    """The lines of a text file, a block at a time, each as ``readline(MAX_LINE_CHARS + 1)`` gives it
    (its line end kept; an overlong line cut to MAX_LINE_CHARS + 1 characters, the rest read and
    dropped in pieces, so a file with no line breaks never fills memory)."""
    carry = ""  # the start of a line not ended yet, at most MAX_LINE_CHARS + 1 characters of it
    limit = MAX_LINE_CHARS + 1
    size = READ_CHARS
    while True:
        chunk = f.read(size)
        size = min(2 * size, READ_CHARS_MOST)
        if not chunk:
            if carry:
                yield [carry]
            return
        pieces = chunk.split("\n")
        pieces[0] = carry + pieces[0]
        carry = pieces.pop()[:limit]
        if pieces:
            lines = [p + "\n" for p in pieces]
            if max(map(len, lines)) > limit:
                lines = [line[:limit] for line in lines]
            yield lines


def looks_like_hex_text(path: str | os.PathLike) -> bool:
    """True when the file's first non-blank, non-comment line reads as '<seconds> <hex>...'."""
    try:
        with open(path, "rb") as f:
            head = f.read(4096)
    except OSError:
        return False
    if b"\x00" in head:
        return False
    try:
        text = head.decode("utf-8")
    except UnicodeDecodeError:
        return False
    saw_setting = False
    for line in text.splitlines():
        s = line.strip()
        if not s:
            continue
        if s.startswith("#"):
            saw_setting = saw_setting or bool(_SETTING.match(s))
            continue
        parts = s.split()
        try:
            float(parts[0])
        except ValueError:
            return False
        return len(parts) > 1 and all(_HEX_TOKEN.match(t) for t in parts[1:])
    return saw_setting
