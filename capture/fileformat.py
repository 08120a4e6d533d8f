"""The capture file: raw bytes with host timestamps, append-only, readable after a crash.

Layout (all integers little-endian; full description in ``docs/capture-format.md``)::

    file   := MAGIC(8) version:u16 header_len:u32 header_json header_crc:u32 block*
    block  := SYNC(4) n:u32 payload_len:u32 head_crc:u32 index[n] payload block_crc:u32
    index  := t_ns:i64 length:u16 port:u8 flags:u8           (12 bytes a record)

A record is what one ``read()`` returned: the port, the monotonic time in nanoseconds when
the call returned, flags, and the bytes. The writer gathers records and writes them as one
block per flush (at least once a second), so a reader handles whole blocks as numpy
columns. A block cut off by a crash still yields every record whose bytes are in the file;
a damaged block is skipped and the reader resynchronises on the next block's SYNC.

Format version changelog:
    1  first version.
"""

from __future__ import annotations

import contextlib
import copy
import json
import os
import re
import socket
import struct
import time
import uuid
import zlib
from collections.abc import Iterator, Sequence
from dataclasses import asdict, dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import BinaryIO

import numpy as np
from buswitness import __version__
from buswitness.errors import InputFileError, NotACaptureError, OutputError, UnsupportedVersionError
from buswitness.protocols import DEFAULT as DEFAULT_PROTOCOL
from buswitness.protocols import canonical as canonical_protocol
from buswitness.records import (  # noqa: F401  (re-exported: the record batch lives on the ground floor)
    FLAG_BREAK,
    FLAG_DISCONNECTED,
    FLAG_LINE_ERROR,
    FLAG_LOST,
    FLAG_NAMES,
    FLAG_PAUSED,
    FLAG_REOPENED,
    FLAG_UNTIMED,
    Record,
    RecordBatch,
    flag_names,
)
from buswitness.serial import SerialFormat

MAGIC = b"\x9bBWCAP\r\n"
FORMAT_VERSION = 1
SUFFIX = ".bwcap"
BLOCK_SYNC = b"\xf0BWB"

_FILE_HEAD = struct.Struct("<8sHI")
_BLOCK_HEAD = struct.Struct("<4sIII")
_U32 = struct.Struct("<I")
INDEX_DTYPE = np.dtype([("t_ns", "<i8"), ("length", "<u2"), ("port", "u1"), ("flags", "u1")])

#: Sanity limits: a block claiming more than this is damage, not data.
MAX_BLOCK_RECORDS = 1 << 20
MAX_BLOCK_PAYLOAD = 64 << 20
MAX_HEADER_BYTES = 1 << 20
#: Header ranges: a value outside is damage or a crafted file. The start year leaves the
#: ~292 years an int64 of nanoseconds spans before a date overflows (year 9999); a part
#: number has four digits in its file name; the monotonic clock is an int64.
START_YEARS = (1970, 2999)
#: Record times: a monotonic clock read in nanoseconds stays far inside int64 (2**62 ns is 146
#: years of uptime), and one capture covers at most a year. A record outside is damage (or a
#: crafted file): kept out, it cannot overflow the decoder's arithmetic or make per-minute
#: figures for centuries of empty time.
MAX_RECORD_NS = 1 << 62
MAX_SPAN_NS = 366 * 86400 * 10**9
MAX_PART = 9999
MAX_MONOTONIC_NS = (1 << 63) - 1

@dataclass
class PortInfo:
    """One serial port of a capture."""

    id: int
    name: str
    latency_ms: float | None = None
    latency_source: str = "unknown"  # "sysfs", "user", "estimated", "simulated", "unknown"
    serial_number: str | None = None
    line_errors: bool = False  # True when the port was set to mark parity/framing errors


@dataclass
class CaptureHeader:
    """Everything a capture knows about itself besides the records."""

    serial: SerialFormat = field(default_factory=SerialFormat)
    ports: list[PortInfo] = field(default_factory=lambda: [PortInfo(0, "unknown")])
    start_utc: str = ""
    start_monotonic_ns: int = 0
    host: str = ""
    tool_version: str = __version__
    notes: str = ""
    source: str = "record"  # "record", "simulate", "import-hex", "import-raw"
    timing: str = "host"  # "host": monotonic read-return times; "none": synthetic times
    capture_id: str = ""
    part: int = 0
    extra: dict = field(default_factory=dict)
    format_version: int = FORMAT_VERSION

    @classmethod
    def new(cls, serial: SerialFormat, ports: Sequence[PortInfo], notes: str = "", source: str = "record",
            **kw) -> CaptureHeader:
        """A header for a capture starting now: UTC wall clock and monotonic clock read together."""
        mono = time.monotonic_ns()
        utc = datetime.now(timezone.utc)
        return cls(serial=serial, ports=list(ports), start_utc=utc.isoformat(timespec="microseconds"),
                   start_monotonic_ns=mono, host=socket.gethostname(), notes=notes, source=source,
                   capture_id=uuid.uuid4().hex, **kw)

    def to_json(self) -> bytes:
        data = asdict(self)
        data["serial"] = self.serial.to_dict()
        return json.dumps(data, sort_keys=True).encode("utf-8")

    @classmethod
    def from_json(cls, raw: bytes, path: object = "?") -> CaptureHeader:
        try:
            data = json.loads(raw.decode("utf-8"))
            ports = [PortInfo(**p) for p in data.pop("ports")]
            serial = SerialFormat.from_dict(data.pop("serial"))
            known = {f for f in cls.__dataclass_fields__}
            extra = {k: v for k, v in data.items() if k not in known}
            data = {k: v for k, v in data.items() if k in known}
            header = cls(serial=serial, ports=ports, **data)
            header.extra.update(extra)
            _check_header(header)
            return header
        except Exception as exc:  # any malformed header is one kind of damage
            raise InputFileError(path, f"the capture header is damaged ({exc})",
                                 "the file cannot be used; check the copy against the original") from None

    def port_name(self, port_id: int) -> str:
        for p in self.ports:
            if p.id == port_id:
                return p.name
        return f"port {port_id}"

    def start_datetime(self) -> datetime | None:
        try:
            return datetime.fromisoformat(self.start_utc)
        except (TypeError, ValueError):
            return None


_HEADER_TEXT = ("start_utc", "host", "tool_version", "notes", "source", "capture_id")
#: What the decoder reads from ``extra`` (port roles as the decoder names them).
_PORT_ROLES = ("master", "slaves", "both")


def _is_int(v: object) -> bool:
    return isinstance(v, int) and not isinstance(v, bool)


def _is_number(v: object, lo: float, hi: float) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and lo <= v <= hi


def _check_start_utc(text: str) -> None:
    """An empty start time (unknown) or a calendar time from 1970 to 2999: later ones overflow a date."""
    if not text:
        return
    try:
        start = datetime.fromisoformat(text)
    except ValueError:
        raise ValueError(f"start_utc {text[:40]!r} is not a date and time (ISO 8601)") from None
    if not START_YEARS[0] <= start.year <= START_YEARS[1]:
        raise ValueError(f"start_utc {text[:40]!r} is not a time from the years {START_YEARS[0]} to {START_YEARS[1]}")


def _check_header(h: CaptureHeader) -> None:
    """Refuse values no writer produces, so a crafted or damaged header fails here, not deep in the decoder."""
    for p in h.ports:
        if not (_is_int(p.id) and 0 <= p.id <= 255):
            raise ValueError(f"port id {p.id!r} is not a number from 0 to 255")
        if not isinstance(p.name, str) or not isinstance(p.latency_source, str):
            raise ValueError(f"port {p.id} name and latency source must be text")
        if p.latency_ms is not None and not _is_number(p.latency_ms, 0.0, 10_000.0):
            raise ValueError(f"port {p.id} latency {p.latency_ms!r} ms is not a number from 0 to 10000")
        if p.serial_number is not None and not isinstance(p.serial_number, str):
            raise ValueError(f"port {p.id} serial number must be text")
    for name in _HEADER_TEXT:
        if not isinstance(getattr(h, name), str):
            raise ValueError(f"{name} must be text")
    if not _is_int(h.start_monotonic_ns) or not _is_int(h.part) or h.part < 0:
        raise ValueError("start_monotonic_ns and part must be whole numbers")
    if not 0 <= h.start_monotonic_ns <= MAX_MONOTONIC_NS:
        raise ValueError(f"start_monotonic_ns {h.start_monotonic_ns} is not a number from 0 to {MAX_MONOTONIC_NS}")
    if h.part > MAX_PART:
        raise ValueError(f"part {h.part} is not a number from 0 to {MAX_PART}")
    if not (_is_int(h.format_version) and 1 <= h.format_version <= FORMAT_VERSION):
        raise ValueError(f"format_version {h.format_version!r} is not a number from 1 to {FORMAT_VERSION}")
    _check_start_utc(h.start_utc)
    if not 1 <= len(h.ports) <= 256 or len({p.id for p in h.ports}) != len(h.ports):
        raise ValueError(f"ports must list 1 to 256 ports with different ids, not {len(h.ports)}")
    if h.timing not in ("host", "none"):
        raise ValueError(f"timing {h.timing!r} is not 'host' or 'none'")
    if not isinstance(h.extra, dict):
        raise ValueError("extra must be an object")
    delay = h.extra.get("host_delay_ms", 0.0)
    if not _is_number(delay, 0.0, 60_000.0):
        raise ValueError(f"host_delay_ms {delay!r} is not a number from 0 to 60000")
    roles = h.extra.get("port_roles", {})
    if not (isinstance(roles, dict) and all(v in _PORT_ROLES for v in roles.values())
                                  and all(str(k).isascii() and str(k).isdigit() and int(k) <= 255
                                          for k in roles)):
        raise ValueError(f"port_roles must map port numbers to one of {', '.join(_PORT_ROLES)}")
    canonical_protocol(h.extra.get("protocol", DEFAULT_PROTOCOL))


def part_path(base: Path, part: int) -> Path:
    """Name of part ``part`` of a rotated capture: ``night.bwcap``, ``night.0001.bwcap``, ..."""
    base = Path(base)
    if part == 0:
        return base
    return base.with_name(f"{base.stem}.{part:04d}{base.suffix}")


_PART_RE = re.compile(r"^(?P<stem>.*)\.(?P<part>\d{4})$")


def _encode_block(index: np.ndarray, payload: bytes) -> bytes:
    body = index.tobytes() + payload
    head_fields = struct.pack("<II", len(index), len(payload))
    head_crc = zlib.crc32(BLOCK_SYNC + head_fields)
    return BLOCK_SYNC + head_fields + _U32.pack(head_crc) + body + _U32.pack(zlib.crc32(body))


def _encode_file_header(header: CaptureHeader) -> bytes:
    raw = header.to_json()
    return _FILE_HEAD.pack(MAGIC, FORMAT_VERSION, len(raw)) + raw + _U32.pack(zlib.crc32(raw))


class CaptureWriter:
    """Append records to a capture file, flushing blocks so a crash loses at most ~1 s.

    ``append`` only buffers; ``tick`` (call it often, e.g. from the writer thread's loop)
    writes a block when ``flush_interval_s`` has passed and fsyncs every ``fsync_interval_s``.
    Rotation starts a new numbered part when the current one passes ``rotate_bytes`` or its
    records span ``rotate_ns`` of capture time; the parts read back as one capture.
    """

    def __init__(self, path: str | os.PathLike, header: CaptureHeader, *, rotate_bytes: int | None = None,
                 rotate_ns: int | None = None, flush_interval_s: float = 1.0, fsync_interval_s: float = 1.0,
                 max_block_records: int = 16384, max_block_bytes: int = 1 << 20, overwrite: bool = False,
                 mode: int = 0o600) -> None:
        self.base = Path(path)
        self.header = header
        if not header.capture_id:
            header.capture_id = uuid.uuid4().hex
        self.rotate_bytes = rotate_bytes
        self.rotate_ns = rotate_ns
        self.flush_interval_s = flush_interval_s
        self.fsync_interval_s = fsync_interval_s
        self.max_block_records = max_block_records
        self.max_block_bytes = max_block_bytes
        self.overwrite = overwrite
        self.mode = mode
        self.parts: list[Path] = []
        self.records_written = 0
        self.bytes_written = 0  # data bytes (not file bytes)
        self.last_t_ns: int | None = None
        self._index: list[tuple[int, int, int, int]] = []
        self._payload = bytearray()
        self._fd: int | None = None
        self._part_size = 0
        self._part_first_t: int | None = None
        self._last_flush = time.monotonic()
        self._last_fsync = self._last_flush
        self._closed = False
        self._open_part(0)

    # -- file handling -------------------------------------------------------------------
    def _open_part(self, part: int) -> None:
        path = part_path(self.base, part)
        flags = os.O_WRONLY | os.O_CREAT | (os.O_TRUNC if self.overwrite else os.O_EXCL)
        try:
            fd = os.open(path, flags, self.mode)
        except FileExistsError:
            raise OutputError(f"{path}: already exists; choose another output name (nothing was overwritten)") from None
        except OSError as exc:
            raise OutputError(f"{path}: cannot create the capture file ({exc.strerror})") from None
        self.header.part = part
        head = _encode_file_header(self.header)
        try:
            view = memoryview(head)
            while view:
                view = view[os.write(fd, view):]
        except OSError as exc:
            # Not even the header fits (a full disk, a size limit): leave no empty or torn file behind.
            os.close(fd)
            with contextlib.suppress(OSError):
                os.unlink(path)
            before = ("nothing was recorded" if part == 0 else
                      "everything recorded before this moment is in the earlier part(s) and reads back")
            raise OutputError(f"{path}: cannot write the capture ({exc.strerror}); {before}") from None
        self._fd = fd
        self._part_size = len(head)
        self._part_first_t = None
        self.parts.append(path)

    def _write_all(self, data: bytes) -> None:
        assert self._fd is not None
        view = memoryview(data)
        try:
            while view:
                n = os.write(self._fd, view)
                view = view[n:]
        except OSError as exc:
            where = self.parts[-1] if self.parts else self.base
            raise OutputError(
                f"{where}: cannot write the capture ({exc.strerror}); everything recorded before this "
                f"moment is in the file and reads back"
            ) from None

    # -- appending -----------------------------------------------------------------------
    def append(self, port: int, t_ns: int, data: bytes = b"", flags: int = 0) -> None:
        """Buffer one record. Long reads are split so a record never exceeds 65535 bytes."""
        if self._closed:
            raise ValueError("capture writer is closed")
        for start in range(0, max(len(data), 1), 65535):
            chunk = data[start:start + 65535]
            self._index.append((int(t_ns), len(chunk), int(port), int(flags)))
            self._payload += chunk
            flags &= ~(FLAG_REOPENED | FLAG_PAUSED | FLAG_LOST | FLAG_DISCONNECTED)
        self.last_t_ns = int(t_ns)
        if len(self._index) >= self.max_block_records or len(self._payload) >= self.max_block_bytes:
            self.flush()

    def tick(self) -> None:
        """Flush and fsync when their intervals have passed (call at least a few times a second)."""
        now = time.monotonic()
        if now - self._last_flush >= self.flush_interval_s:
            self.flush()
        if now - self._last_fsync >= self.fsync_interval_s:
            self.sync()

    def flush(self) -> None:
        """Write the buffered records as one block (rotating first if the part is full)."""
        self._last_flush = time.monotonic()
        if not self._index:
            return
        first_t = self._index[0][0]
        if self._part_first_t is not None and self._rotation_due(first_t):
            self.sync()
            os.close(self._fd)  # type: ignore[arg-type]
            self._fd = None
            self._open_part(len(self.parts))
        if self._part_first_t is None:
            self._part_first_t = first_t
        index = np.array(self._index, dtype=INDEX_DTYPE)
        block = _encode_block(index, bytes(self._payload))
        self._write_all(block)
        self._part_size += len(block)
        self.records_written += len(self._index)
        self.bytes_written += len(self._payload)
        self._index.clear()
        self._payload.clear()

    def append_batch(self, batch: RecordBatch) -> None:
        """Append many records at once (the simulator's bulk path), written straight out as whole blocks."""
        if self._closed:
            raise ValueError("capture writer is closed")
        n = len(batch)
        if not n:
            return
        if int(batch.length.max()) > 65535:
            for r in batch.records():
                self.append(r.port, r.t_ns, r.data, r.flags)
            return
        self.flush()
        offs = np.r_[0, np.cumsum(batch.length)]
        payload = np.ascontiguousarray(batch.payload, dtype=np.uint8)
        start = 0
        while start < n:
            stop = min(n, start + self.max_block_records,
                       max(start + 1, int(np.searchsorted(offs, offs[start] + self.max_block_bytes, "right")) - 1))
            index = np.empty(stop - start, dtype=INDEX_DTYPE)
            index["t_ns"] = batch.t_ns[start:stop]
            index["length"] = batch.length[start:stop]
            index["port"] = batch.port[start:stop]
            index["flags"] = batch.flags[start:stop]
            if self._part_first_t is not None and self._rotation_due(int(index["t_ns"][0])):
                self.sync()
                os.close(self._fd)  # type: ignore[arg-type]
                self._fd = None
                self._open_part(len(self.parts))
            if self._part_first_t is None:
                self._part_first_t = int(index["t_ns"][0])
            block = _encode_block(index, payload[offs[start]:offs[stop]].tobytes())
            self._write_all(block)
            self._part_size += len(block)
            self.records_written += stop - start
            self.bytes_written += int(offs[stop] - offs[start])
            start = stop
        self.last_t_ns = int(batch.t_ns[-1])

    def _rotation_due(self, next_t: int) -> bool:
        if self.rotate_bytes is not None and self._part_size >= self.rotate_bytes:
            return True
        if self.rotate_ns is not None and self._part_first_t is not None:
            return next_t - self._part_first_t >= self.rotate_ns
        return False

    def sync(self) -> None:
        """Push written blocks to the disk (fsync)."""
        self._last_fsync = time.monotonic()
        if self._fd is not None:
            try:
                os.fsync(self._fd)
            except OSError:
                pass  # e.g. a pipe or a file system without fsync: nothing more we can do

    def close(self) -> None:
        """Flush, fsync and close. Safe to call twice."""
        if self._closed:
            return
        try:
            self.flush()
            self.sync()
        finally:
            self._closed = True
            if self._fd is not None:
                os.close(self._fd)
                self._fd = None

    def __enter__(self) -> CaptureWriter:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


@dataclass
class ReadReport:
    """What the reader found besides the records: damage, cut-off tails, missing parts."""

    files: list[str] = field(default_factory=list)
    records: int = 0
    data_bytes: int = 0
    blocks: int = 0
    truncated_tail: bool = False          #: the last block of some part was cut off (crash, copy cut short)
    truncated_records_kept: int = 0       #: records recovered from cut-off blocks
    bad_blocks: int = 0                   #: damaged blocks skipped
    bad_block_records: int = 0            #: records in damaged blocks (lost), where the count was readable
    bytes_skipped: int = 0                #: file bytes passed over while resynchronising
    missing_parts: list[int] = field(default_factory=list)
    lines_skipped: int = 0                #: malformed hex-text lines skipped (--on-bad-line skip)
    bad_time_records: int = 0             #: records with an impossible time (see MAX_RECORD_NS), left out
    read_error: str = ""                  #: the read error (EIO) that ended reading; what came before is kept
    warnings: list[str] = field(default_factory=list)

    @property
    def clean(self) -> bool:
        return not (self.truncated_tail or self.bad_blocks or self.bytes_skipped or self.missing_parts
                    or self.lines_skipped or self.bad_time_records or self.read_error)

    def since(self, earlier: ReadReport) -> ReadReport:
        """What was found after ``earlier`` (a copy of this report taken before): counts, flags and warnings."""
        return ReadReport(
            files=list(self.files), missing_parts=list(self.missing_parts),
            **{name: getattr(self, name) - getattr(earlier, name) for name in _REPORT_COUNTS},
            truncated_tail=self.truncated_tail and not earlier.truncated_tail,
            read_error=self.read_error if self.read_error != earlier.read_error else "",
            warnings=self.warnings[len(earlier.warnings):])

    def add(self, later: ReadReport) -> None:
        """Take in what ``later`` (a report of the part read after this one) found."""
        for name in _REPORT_COUNTS:
            setattr(self, name, getattr(self, name) + getattr(later, name))
        self.truncated_tail = self.truncated_tail or later.truncated_tail
        self.read_error = self.read_error or later.read_error
        self.warnings = self.warnings + [w for w in later.warnings if w not in self.warnings]

    def summary(self) -> str:
        lines = [f"{self.records} records, {self.data_bytes} bytes in {self.blocks} blocks, {len(self.files)} file(s)"]
        if self.lines_skipped:
            lines.append(f"{self.lines_skipped} malformed line{'s' if self.lines_skipped != 1 else ''} skipped")
        lines.extend(self.warnings)
        return "\n".join(lines)


#: The counts of a :class:`ReadReport` (added up over the parts of a capture read apart).
_REPORT_COUNTS = ("records", "data_bytes", "blocks", "truncated_records_kept", "bad_blocks", "bad_block_records",
                  "bytes_skipped", "lines_skipped", "bad_time_records")


@dataclass(frozen=True)
class SkimmedBlock:
    """A block passed over (:meth:`CaptureReader.iter_skimming`): how many records, how many bytes.

    Its header and checksum were checked, its records not unpacked (nor their times checked): a
    reading that relies on it checks later that a full reading placed the same blocks
    (:class:`WatchPoint`).
    """

    records: int
    payload_bytes: int
    lengths: np.ndarray | None = None  #: each record's length, read only for a block of many records

    def __len__(self) -> int:
        return self.records


@dataclass(frozen=True)
class WatchPoint:
    """Where reading stood at the block that reaches past a place asked for (:meth:`CaptureReader.watch`),
    before reading it: two readers at the same point have placed the same blocks before it."""

    part: int      #: which file of the set
    offset: int    #: the block's byte offset in that file
    place: int     #: records x 12 + payload bytes before it: of the records kept, or of a block skimmed
    report: ReadReport  #: a copy of the reader's report there


def read_header(path: str | os.PathLike) -> CaptureHeader:
    """Read and check only the file header of one capture file."""
    with _open_for_read(path) as f:
        try:
            return _read_file_header(f, path)
        except OSError as exc:
            raise InputFileError(path, f"cannot be read ({exc.strerror or exc.__class__.__name__})",
                                 "a read error in the file header: nothing usable; copy the file again") from None


def _open_for_read(path: str | os.PathLike) -> BinaryIO:
    p = Path(path)
    if p.is_dir():
        raise InputFileError(p, "is a directory, not a capture file", "give the path of a .bwcap file")
    try:
        return open(p, "rb")
    except FileNotFoundError:
        raise InputFileError(p, "no such file") from None
    except OSError as exc:
        raise InputFileError(p, f"cannot be opened ({exc.strerror})") from None


def _read_file_header(f: BinaryIO, path: object) -> CaptureHeader:
    head = f.read(_FILE_HEAD.size)
    if len(head) < _FILE_HEAD.size or not head.startswith(MAGIC):
        if head[: len(MAGIC)] == MAGIC[: len(head)] and head:
            raise InputFileError(path, "the capture file is cut off inside its header", "nothing usable remains")
        kind = "empty" if not head else "not a buswitness capture file"
        raise NotACaptureError(path, f"is {kind}",
                               "for hex text or raw bytes, use the import options of 'analyze' "
                               "(--input-kind hex or raw)" if head else "")
    _, version, header_len = _FILE_HEAD.unpack(head)
    if version > FORMAT_VERSION or version == 0:
        raise UnsupportedVersionError(
            path, f"is a capture of format version {version}; this buswitness {__version__} reads versions "
                  f"1 to {FORMAT_VERSION}", "update buswitness to read it")
    if header_len > MAX_HEADER_BYTES:
        raise InputFileError(path, "the capture header is damaged (impossible length)")
    raw = f.read(header_len)
    crc = f.read(4)
    if len(raw) < header_len or len(crc) < 4:
        raise InputFileError(path, "the capture file is cut off inside its header", "nothing usable remains")
    if zlib.crc32(raw) != _U32.unpack(crc)[0]:
        raise InputFileError(path, "the capture header is damaged (checksum mismatch)")
    return CaptureHeader.from_json(raw, path)


def find_parts(path: str | os.PathLike) -> tuple[list[Path], list[int]]:
    """All parts of the rotated capture that ``path`` belongs to, in order, and any missing part numbers."""
    p = Path(path)
    m = _PART_RE.match(p.stem)
    base = p.with_name(f"{m.group('stem')}{p.suffix}") if m else p
    found: dict[int, Path] = {}
    if base.exists():
        found[0] = base
    pattern = re.compile(re.escape(base.stem) + r"\.(\d{4})" + re.escape(base.suffix) + "$")
    if base.parent.exists():
        for sib in base.parent.iterdir():
            mm = pattern.match(sib.name)
            if mm:
                found[int(mm.group(1))] = sib
    if not found:
        return [p], []
    if p not in found.values():
        found[-1] = p
    numbers = sorted(found)
    highest = numbers[-1]
    missing = [k for k in range(highest + 1) if k not in found]
    return [found[k] for k in numbers], missing


class CaptureReader:
    """Stream a capture (one file or a rotated set) block by block, never loading it whole.

    ``CaptureReader("night.bwcap")`` finds the set's other parts by name and checks that
    they belong to the same capture. ``iter_batches`` yields :class:`RecordBatch` columns;
    ``iter_records`` yields :class:`Record` objects. Damage is skipped and counted in
    ``report``; only a file with no readable header raises.
    """

    def __init__(self, path: str | os.PathLike | Sequence[str | os.PathLike], *, single_file: bool = False,
                 read_size: int = 4 << 20) -> None:
        self.report = ReadReport()
        missing: list[int] = []
        if isinstance(path, (str, os.PathLike)):
            if single_file:
                paths = [Path(path)]
            else:
                paths, missing = find_parts(path)
        else:
            paths, missing = [Path(p) for p in path], []
        self.read_size = read_size
        self._anchor_ns: int | None = None
        self._place = 0                 # records x 12 + payload of the blocks read or skimmed so far
        self._skim_until = 0            # skim whole blocks that end at or before this place
        self._lengths_over = 0          # ... reading the lengths of a skimmed block of more records
        self._marks: list[int] = []     # places still watched for, ascending
        self.watched: dict[int, WatchPoint] = {}
        self.header = read_header(paths[0])
        self.paths: list[Path] = []
        for p in paths:
            h = self.header if p == paths[0] else read_header(p)
            if h.capture_id != self.header.capture_id:
                self.report.warnings.append(f"{p}: belongs to another capture; left out")
                continue
            self.paths.append(p)
        self.report.files = [str(p) for p in self.paths]
        if missing:
            self.report.missing_parts = missing
            self.report.warnings.append(
                f"part(s) {', '.join(str(m) for m in missing)} of this capture are missing; "
                f"the time they covered is a gap in every figure")

    def iter_batches(self) -> Iterator[RecordBatch]:
        yield from self.iter_skimming(0)  # type: ignore[misc]  # skims nothing: batches only

    def iter_skimming(self, skim_until: int, lengths_over: int = 0) -> Iterator[RecordBatch | SkimmedBlock]:
        """The batches, but the capture's start passed over: a block that ends at or before place
        ``skim_until`` (records x 12 + payload bytes from the start) is yielded as a
        :class:`SkimmedBlock`, its body checked but not unpacked (and not counted in ``report``),
        with its records' lengths when it holds more than ``lengths_over`` records (0: never).

        For a process that decodes a later part of a long capture and only needs to number what
        comes before it. Blocks are read in full until one has set the capture's clock anchor, and
        so is a block not wholly in the file. A damaged block is skipped as a full reading skips
        it; records a full reading would leave out for an impossible time are counted here, which
        the readers' :class:`WatchPoint` shows.
        """
        self._place, self._skim_until, self._lengths_over = 0, skim_until, lengths_over
        for k, p in enumerate(self.paths):
            yield from self._iter_file(p, k)

    def watch(self, *places: int) -> None:
        """Note a :class:`WatchPoint` in ``watched[place]`` at the block that reaches past each place
        (the first whose records end after it), before that block is read, in the next reading."""
        self._marks = sorted(set(places))
        self.watched = {}

    def _take_watch(self, part: int, offset: int, end: int) -> None:
        while self._marks and self._marks[0] < end:
            mark = self._marks.pop(0)
            self.watched[mark] = WatchPoint(part, offset, self._place, copy.deepcopy(self.report))

    def iter_records(self) -> Iterator[Record]:
        for batch in self.iter_batches():
            yield from batch.records()

    def _iter_file(self, path: Path, part: int = 0) -> Iterator[RecordBatch | SkimmedBlock]:
        with _open_for_read(path) as f:
            try:
                yield from self._iter_blocks(f, path, part)
            except OSError as exc:  # a failing medium (EIO): keep what was read, say where it stopped
                self._note_read_error(path, f, exc)

    def _note_read_error(self, path: Path, f: BinaryIO, exc: OSError) -> None:
        try:
            where = f"at about byte {f.tell()}"
        except (OSError, ValueError):
            where = "part-way"
        reason = exc.strerror or exc.__class__.__name__
        self.report.read_error = reason
        self.report.warnings.append(
            f"{path}: read error {where} ({reason}); the records read before it are kept, the rest of this "
            f"file could not be read (copy it again, or read it from another drive)")

    def _iter_blocks(self, f: BinaryIO, path: Path, part: int = 0) -> Iterator[RecordBatch | SkimmedBlock]:
        rep = self.report
        _read_file_header(f, path)
        size = os.fstat(f.fileno()).st_size if self._skim_until else 0
        while True:
            pos = f.tell()
            head = f.read(_BLOCK_HEAD.size)
            if not head:
                return
            if len(head) < _BLOCK_HEAD.size:
                if BLOCK_SYNC.startswith(head[:4]) or head.startswith(BLOCK_SYNC):
                    self._note_truncated(path)
                else:
                    rep.bytes_skipped += len(head)
                return
            sync, n, plen, hcrc = _BLOCK_HEAD.unpack(head)
            if (sync != BLOCK_SYNC or zlib.crc32(head[:12]) != hcrc or n > MAX_BLOCK_RECORDS
                    or plen > MAX_BLOCK_PAYLOAD):
                if not self._resync(f, pos + 1, path):
                    return
                continue
            body_len = n * INDEX_DTYPE.itemsize + plen
            if self._marks and self._marks[0] < self._place + body_len:
                self._take_watch(part, pos, self._place + body_len)
            if (self._skim_until and self._place + body_len <= self._skim_until and self._anchor_ns is not None
                    and pos + _BLOCK_HEAD.size + body_len + 4 <= size):
                # the body is read for its checksum only: a damaged block is passed over as a full
                # reading passes over it, so damage before a segment's warm-up moves no step
                body = f.read(body_len)
                if zlib.crc32(body) != _U32.unpack(f.read(4))[0]:
                    continue
                lengths = None
                if self._lengths_over and n > self._lengths_over:
                    lengths = np.frombuffer(body, INDEX_DTYPE, count=n)["length"].astype(np.int64)
                    if int(lengths.sum()) != plen:  # inconsistent: a full reading skips it too
                        continue
                self._place += body_len
                yield SkimmedBlock(n, plen, lengths)
                continue
            body = f.read(body_len)
            crc = f.read(4)
            if len(body) < body_len or len(crc) < 4:
                batch = self._in_span(self._salvage(body, n, plen), path, pos)
                self._note_truncated(path, len(batch))
                if len(batch):
                    rep.records += len(batch)
                    rep.data_bytes += int(batch.length.sum())
                    self._place += len(batch) * INDEX_DTYPE.itemsize + int(batch.payload.size)
                    yield batch
                return
            if zlib.crc32(body) != _U32.unpack(crc)[0]:
                rep.bad_blocks += 1
                rep.bad_block_records += n
                rep.warnings.append(f"{path}: a damaged block of {n} records at byte {pos} was skipped")
                continue
            index = np.frombuffer(body, dtype=INDEX_DTYPE, count=n)
            lengths = index["length"].astype(np.int64)
            if int(lengths.sum()) != plen:
                rep.bad_blocks += 1
                rep.bad_block_records += n
                rep.warnings.append(f"{path}: an inconsistent block at byte {pos} was skipped")
                continue
            batch = self._in_span(RecordBatch(
                t_ns=index["t_ns"].astype(np.int64),
                length=lengths,
                port=index["port"].copy(),
                flags=index["flags"].copy(),
                payload=np.frombuffer(body, dtype=np.uint8, offset=n * INDEX_DTYPE.itemsize).copy(),
            ), path, pos)
            rep.blocks += 1
            rep.records += len(batch)
            kept = plen if len(batch) == n else int(batch.length.sum())
            rep.data_bytes += kept
            self._place += len(batch) * INDEX_DTYPE.itemsize + kept
            yield batch

    def _in_span(self, batch: RecordBatch, path: Path, pos: int) -> RecordBatch:
        """The records whose times are possible: inside ±MAX_RECORD_NS and within MAX_SPAN_NS of the first."""
        if not len(batch):
            return batch
        t = batch.t_ns
        if self._anchor_ns is None:
            sane = t[(t >= -MAX_RECORD_NS) & (t <= MAX_RECORD_NS)]
            if not len(sane):
                return self._drop_times(batch, np.zeros(len(batch), bool), path, pos)
            self._anchor_ns = int(sane[0])
        lo = max(-MAX_RECORD_NS, self._anchor_ns - MAX_SPAN_NS)
        hi = min(MAX_RECORD_NS, self._anchor_ns + MAX_SPAN_NS)
        if int(t.min()) >= lo and int(t.max()) <= hi:  # the usual case: no mask to build
            return batch
        keep = (t >= lo) & (t <= hi)
        return self._drop_times(batch, keep, path, pos)

    def _drop_times(self, batch: RecordBatch, keep: np.ndarray, path: Path, pos: int) -> RecordBatch:
        dropped = int((~keep).sum())
        self.report.bad_time_records += dropped
        self.report.warnings.append(
            f"{path}: {dropped} record(s) with an impossible time (more than {MAX_SPAN_NS // 86_400_000_000_000} "
            f"days from the first record) in the block at byte {pos} left out")
        return RecordBatch(batch.t_ns[keep], batch.length[keep], batch.port[keep], batch.flags[keep],
                           batch.payload[np.repeat(keep, batch.length)])

    def _note_truncated(self, path: Path, kept: int = 0) -> None:
        self.report.truncated_tail = True
        self.report.truncated_records_kept += kept
        self.report.warnings.append(
            f"{path}: the file ends inside its last block (the recording was cut off); "
            f"{kept} record(s) of that block were recovered")

    def _salvage(self, body: bytes, n: int, plen: int) -> RecordBatch:
        """Records of a cut-off block whose bytes are all in the file."""
        isz = INDEX_DTYPE.itemsize
        if len(body) < n * isz:
            return RecordBatch.empty()
        index = np.frombuffer(body, dtype=INDEX_DTYPE, count=n)
        lengths = index["length"].astype(np.int64)
        available = len(body) - n * isz
        ends = np.cumsum(lengths)
        keep = int(np.searchsorted(ends, available, side="right"))
        payload = np.frombuffer(body, dtype=np.uint8, offset=n * isz, count=int(ends[keep - 1]) if keep else 0)
        return RecordBatch(index["t_ns"][:keep].astype(np.int64), lengths[:keep], index["port"][:keep].copy(),
                           index["flags"][:keep].copy(), payload.copy())

    def _resync(self, f: BinaryIO, start: int, path: Path) -> bool:
        """Move to the next block SYNC at or after ``start``; False at end of file."""
        f.seek(start)
        base = start  # file offset of buf[0]
        carry = b""
        keep = len(BLOCK_SYNC) - 1
        while True:
            chunk = f.read(self.read_size)
            buf = carry + chunk
            i = buf.find(BLOCK_SYNC)
            if i >= 0:
                found = base + i
                skipped = found - (start - 1)
                self.report.bytes_skipped += skipped
                self.report.warnings.append(f"{path}: {skipped} damaged byte(s) skipped at byte {start - 1}")
                f.seek(found)
                return True
            if not chunk:
                skipped = base + len(buf) - (start - 1)
                self.report.bytes_skipped += skipped
                self.report.warnings.append(f"{path}: {skipped} damaged byte(s) at the end skipped")
                return False
            carry = buf[-keep:]
            base += len(buf) - len(carry)
