"""The decoder facade: records in, frames, damage events and transactions out. No I/O.

``Decoder.feed`` takes one record and returns objects (for tests and small inputs);
``Decoder.feed_batch`` takes a :class:`~buswitness.capture.fileformat.RecordBatch` and returns
a :class:`DecodeOutput` of DataFrames laid out as ``docs/tables.md`` says. Both keep their
state between calls, so a frame may straddle two records or two batches, and ``flush``
closes whatever is still open at the end of the input.
"""

from __future__ import annotations

import heapq
from dataclasses import dataclass, field
from typing import Iterator

import numpy as np
import pandas as pd

from buswitness.capture.fileformat import (FLAG_BREAK, FLAG_DISCONNECTED, FLAG_LINE_ERROR, FLAG_LOST,
                                           FLAG_PAUSED, FLAG_REOPENED, CaptureHeader, RecordBatch)
from buswitness.decode.arrival import Timeline
from buswitness.decode.ascii import AsciiScanner, decode_ascii_frame
from buswitness.decode.events import DIRECTIONS, EVENT_KINDS, OUTCOMES, Damage, Frame, Transaction
from buswitness.decode.framer import JUNK, RegionScanner, Span
from buswitness.decode.lengths import MIN_FRAME, PUBLIC_CODES, REQUEST, RESPONSE, candidate_lengths
from buswitness.decode.pairing import Pairing
from buswitness.decode.timing import SerialFormat
from buswitness.errors import UsageError

DEFAULT_LATENCY_MS = 16.0
DEFAULT_HOST_DELAY_MS = 1.0
PORT_ROLES = ("master", "slaves", "both")
PROTOCOLS = ("rtu", "ascii")

_GAP_FLAGS = FLAG_REOPENED | FLAG_PAUSED | FLAG_DISCONNECTED
_CUT_FLAGS = _GAP_FLAGS | FLAG_BREAK | FLAG_LOST
_MARKS = (("line_error", FLAG_LINE_ERROR), ("break", FLAG_BREAK), ("bytes_lost", FLAG_LOST), ("port_gap", _GAP_FLAGS))
_MARK_TEXT = {
    "line_error": "bytes marked bad by the UART (parity or framing error)",
    "break": "a break (line held low) was received",
    "bytes_lost": "bytes were lost before this read (overrun or queue overflow)",
    "port_gap": "the port was disconnected, reopened or paused: traffic in between is unknown",
}


@dataclass
class DecoderConfig:
    """What the decoder needs to know about the line and the capture."""

    serial: SerialFormat = field(default_factory=SerialFormat)
    latency_ms: dict[int, float] = field(default_factory=dict)
    host_delay_ms: float = DEFAULT_HOST_DELAY_MS
    protocol: str = "rtu"
    untimed: bool = False
    port_roles: dict[int, str] = field(default_factory=dict)
    response_timeout_ms: float | None = None
    packet_bytes: int = 62

    def __post_init__(self) -> None:
        if self.protocol not in PROTOCOLS:
            raise UsageError(f"protocol {self.protocol!r} is not one of {', '.join(PROTOCOLS)}")
        for port, role in self.port_roles.items():
            if role not in PORT_ROLES:
                raise UsageError(f"port {port} role {role!r} is not one of {', '.join(PORT_ROLES)} "
                                 f"(master: the port hears only the master; slaves: only the stations)")
        if self.response_timeout_ms is not None and not self.response_timeout_ms > 0:
            raise UsageError(f"response timeout {self.response_timeout_ms!r} ms must be a positive number")
        if not self.host_delay_ms >= 0:
            raise UsageError(f"host delay {self.host_delay_ms!r} ms must be zero or more")

    @classmethod
    def from_header(cls, header: CaptureHeader, response_timeout_ms: float | None = None,
                    host_delay_ms: float | None = None, protocol: str | None = None,
                    port_roles: dict[int, str] | None = None) -> "DecoderConfig":
        """Settings from a capture header; anything the header lacks gets the documented default.

        Port roles come from ``port_roles``, else from ``header.extra["port_roles"]``, else
        every port hears both directions (a two-wire bus).
        """
        latency = {p.id: float(p.latency_ms) if p.latency_ms else DEFAULT_LATENCY_MS for p in header.ports}
        roles = port_roles
        if roles is None:
            extra = header.extra.get("port_roles") or {}
            roles = {int(k): str(v) for k, v in extra.items()} if isinstance(extra, dict) else {}
        proto = protocol or str(header.extra.get("protocol", "rtu")).lower()
        delay = host_delay_ms
        if delay is None:
            delay = float(header.extra.get("host_delay_ms", DEFAULT_HOST_DELAY_MS))
        return cls(serial=header.serial, latency_ms=latency, host_delay_ms=delay, protocol=proto,
                   untimed=header.timing == "none", port_roles=roles, response_timeout_ms=response_timeout_ms)

    def latency_for(self, port: int) -> float:
        return self.latency_ms.get(port, DEFAULT_LATENCY_MS)

    def role_for(self, port: int) -> str:
        return self.port_roles.get(port, "both")


FRAME_COLUMNS = ("t_start_ns", "t_end_ns", "t_end_lo_ns", "t_end_hi_ns", "port", "address", "function", "length",
                 "direction", "raw")
TRANSACTION_COLUMNS = ("t_request_end_ns", "t_response_start_ns", "station", "function", "outcome",
                       "exception_code", "retry", "response_ms", "response_ms_low", "response_ms_high",
                       "request_raw", "response_raw")
EVENT_COLUMNS = ("t_ns", "kind", "station", "port", "raw", "detail")


def frames_table(frames: list[Frame]) -> pd.DataFrame:
    """Frames as the ``frames`` table of docs/tables.md."""
    return pd.DataFrame({
        "t_start_ns": np.array([f.t_start_ns for f in frames], dtype=np.int64),
        "t_end_ns": np.array([f.t_end_ns for f in frames], dtype=np.int64),
        "t_end_lo_ns": np.array([f.t_end_lo_ns for f in frames], dtype=np.int64),
        "t_end_hi_ns": np.array([f.t_end_hi_ns for f in frames], dtype=np.int64),
        "port": np.array([f.port for f in frames], dtype=np.uint8),
        "address": np.array([f.address for f in frames], dtype=np.uint8),
        "function": np.array([f.function for f in frames], dtype=np.uint8),
        "length": np.array([f.length for f in frames], dtype=np.int32),
        "direction": pd.Categorical([f.direction for f in frames], categories=DIRECTIONS),
        "raw": pd.Series([f.raw for f in frames], dtype=object),
    })


def transactions_table(txns: list[Transaction]) -> pd.DataFrame:
    """Transactions as the ``transactions`` table of docs/tables.md."""
    return pd.DataFrame({
        "t_request_end_ns": np.array([t.t_request_end_ns for t in txns], dtype=np.int64),
        "t_response_start_ns": np.array([t.t_response_start_ns for t in txns], dtype=np.int64),
        "station": np.array([t.station for t in txns], dtype=np.uint8),
        "function": np.array([t.function for t in txns], dtype=np.uint8),
        "outcome": pd.Categorical([t.outcome for t in txns], categories=OUTCOMES),
        "exception_code": np.array([t.exception_code for t in txns], dtype=np.uint8),
        "retry": np.array([t.retry for t in txns], dtype=bool),
        "response_ms": np.array([t.response_ms for t in txns], dtype=np.float64),
        "response_ms_low": np.array([t.response_ms_low for t in txns], dtype=np.float64),
        "response_ms_high": np.array([t.response_ms_high for t in txns], dtype=np.float64),
        "request_raw": pd.Series([t.request_raw for t in txns], dtype=object),
        "response_raw": pd.Series([t.response_raw for t in txns], dtype=object),
    })


def events_table(events: list[Damage]) -> pd.DataFrame:
    """Damage and notable-traffic events as the ``events`` table of docs/tables.md."""
    return pd.DataFrame({
        "t_ns": np.array([e.t_ns for e in events], dtype=np.int64),
        "kind": pd.Categorical([e.kind for e in events], categories=EVENT_KINDS),
        "station": np.array([e.station for e in events], dtype=np.int16),
        "port": np.array([e.port for e in events], dtype=np.uint8),
        "raw": pd.Series([e.raw for e in events], dtype=object),
        "detail": pd.Series([e.detail for e in events], dtype=object),
    })


@dataclass
class DecodeOutput:
    """The three tables one call produced (any may be empty)."""

    frames: pd.DataFrame
    transactions: pd.DataFrame
    events: pd.DataFrame

    @classmethod
    def from_objects(cls, items: list) -> "DecodeOutput":
        return cls(frames_table([x for x in items if isinstance(x, Frame)]),
                   transactions_table([x for x in items if isinstance(x, Transaction)]),
                   events_table([x for x in items if isinstance(x, Damage)]))


def _describe_damage(raw: bytes, at_boundary: bool) -> tuple[str, int, str]:
    """Kind, likely station and a sentence for a run of bytes that forms no valid frame."""
    n = len(raw)
    fc = raw[1] if n >= 2 else -1
    shaped = n >= 2 and raw[0] <= 247 and (fc in PUBLIC_CODES or (fc & 0x80 and (fc & 0x7F) in PUBLIC_CODES))
    if shaped:
        rules = [length for length, _ in candidate_lengths(raw, 0, n) if length]
        if at_boundary and rules and max(rules) > n:
            return "truncated", raw[0], (f"a frame from or to station {raw[0]} cut short after {n} bytes "
                                         f"(expected {max(rules)})")
        if n >= MIN_FRAME:
            return "crc_error", raw[0], f"{n} bytes shaped like a frame for station {raw[0]}, CRC check failed"
    return "stray_bytes", -1, f"{n} stray byte{'s' if n != 1 else ''} that form no frame"


class _Port:
    """One port's stream: unsettled bytes, the framer's state and the byte-time model."""

    def __init__(self, port: int, cfg: DecoderConfig) -> None:
        self.port = port
        fmt = cfg.serial
        self.char_ns = fmt.char_time_s * 1e9
        self.t15_ns = fmt.t15_s * 1e9
        self.t35_ns = fmt.t35_s * 1e9
        self.ascii = cfg.protocol == "ascii"
        self.scanner: RegionScanner | AsciiScanner = AsciiScanner() if self.ascii else RegionScanner()
        self.timeline = Timeline(self.char_ns, cfg.latency_for(port) * 1e6, cfg.host_delay_ms * 1e6,
                                 cfg.packet_bytes, cfg.untimed)
        self.untimed = cfg.untimed
        self.buf = bytearray()
        self.base = 0  # absolute stream position of buf[0]
        self.silences: dict[int, float] = {}  # absolute position of a record start -> least silence before it
        self.last_key = -(1 << 62)
        self._marks: dict[str, list] = {}
        self._merge_ns = cfg.latency_for(port) * 1e6 + cfg.host_delay_ms * 1e6 + 4 * self.char_ns

    def add(self, t_ns: int, data: bytes, flags: int, out: list) -> None:
        """Take one record; append (sort key, item) pairs for what it completes to ``out``."""
        if flags & _CUT_FLAGS:
            self._scan(False, out)
            self.scanner.add_boundary(len(self.buf))
        if data:
            start = self.base + len(self.buf)
            silence = self.timeline.add(t_ns, len(data))
            if silence > self.t35_ns and not self.ascii:
                self.scanner.add_boundary(len(self.buf))
            if silence > self.t15_ns:
                self.silences[start] = silence
            self.buf.extend(data)
        self._scan(False, out)

    def flush(self, out: list) -> None:
        self._scan(True, out)
        for kind in list(self._marks):
            out.append(self._mark_item(kind))

    def marks(self, t_ns: int, data: bytes, flags: int, out: list) -> None:
        """Turn record flags into events; consecutive marked records make one event with all their bytes."""
        present = {kind for kind, bit in _MARKS if flags & bit}
        for kind in list(self._marks):
            run = self._marks[kind]
            if kind not in present and (data or t_ns - run[1] > self._merge_ns):
                out.append(self._mark_item(kind))
        for kind in present:
            run = self._marks.get(kind)
            if run is not None and t_ns - run[1] <= self._merge_ns:
                run[1] = t_ns
                run[2] += data if kind == "line_error" else b""
            else:
                if run is not None:
                    out.append(self._mark_item(kind))
                self._marks[kind] = [t_ns, t_ns, bytearray(data if kind == "line_error" else b"")]

    def _mark_item(self, kind: str) -> tuple:
        t_first, _t_last, raw = self._marks.pop(kind)
        # The marked bytes arrived within one adapter period before the first such read returned.
        t = int(t_first - self._merge_ns / 2)
        return t, ("damage", Damage(kind, self.port, t, bytes(raw), -1, _MARK_TEXT[kind]))

    def first_open_time(self) -> int | None:
        """Earliest time an item this port still holds back could carry (None: holds nothing)."""
        settled = self.scanner.settled
        if settled >= len(self.buf):
            return None
        lo, _hi = self.timeline.end_bounds(self.base + settled, self.base + settled)
        return lo - int(self.char_ns)

    def _scan(self, final: bool, out: list) -> None:
        spans: list[Span] = []
        self.scanner.scan(self.buf, len(self.buf), final, spans)
        for span in spans:
            out.append(self._item(span))
        settled = self.scanner.settled
        if settled:
            del self.buf[:settled]
            self.base += settled
            self.scanner.shift(settled)
            self.timeline.drop_before(self.base)
            if self.silences:
                self.silences = {k: v for k, v in self.silences.items() if k >= self.base}

    def _item(self, span: Span) -> tuple:
        a, b = self.base + span.start, self.base + span.end
        raw = bytes(self.buf[span.start:span.end])
        lo, hi = self.timeline.end_bounds(a, b - 1)
        if span.shape == JUNK:
            # Damaged bytes are mostly one talker's back-to-back bytes: bound them like a frame.
            t = (lo + hi) // 2 - int(round(len(raw) * self.char_ns))
            kind, station, detail = _describe_damage(raw, span.at_boundary)
            return t, ("damage", Damage(kind, self.port, t, raw, station, detail))
        gaps = [s for pos, s in self.silences.items() if a < pos < b]
        t_start = (lo + hi) // 2 - int(round(len(raw) * self.char_ns))
        wire = 0
        if self.ascii:
            wire = len(raw)
            raw = decode_ascii_frame(raw) or raw
            gaps = []
        return t_start, ("frame", self.port, raw, lo, hi, span.shape, max(gaps) if gaps else 0.0, wire)


class Decoder:
    """Sans-I/O decoder over one capture's records (all ports)."""

    def __init__(self, config: DecoderConfig | None = None) -> None:
        self.config = config or DecoderConfig()
        self.ports: dict[int, _Port] = {}
        fmt = self.config.serial
        self.char_ns = fmt.char_time_s * 1e9
        self.pairing = Pairing(self.config.response_timeout_ms, fmt.t35_s * 1e9, timed=not self.config.untimed)
        self._queue: list[tuple[int, int, tuple]] = []
        self._seq = 0
        self._slack_ns = int(max([self.config.latency_for(p) for p in self.config.latency_ms] + [DEFAULT_LATENCY_MS])
                             * 1e6 + self.config.host_delay_ms * 1e6)

    # -- object view --------------------------------------------------------------------------
    def feed(self, port: int, t_ns: int, data: bytes, flags: int = 0) -> list:
        """Take one record (what one read returned); return the Frames, Damage and Transactions it completes."""
        out: list = []
        self._record(int(port), int(t_ns), bytes(data), int(flags))
        self._release(int(t_ns) - self._slack_ns, out)
        return out

    def flush_events(self) -> list:
        """End of input: close the last frame and pending transaction; return what that completes."""
        out: list = []
        for p in self.ports.values():
            items: list = []
            p.flush(items)
            self._enqueue(p, items)
        self._release(None, out)
        out.extend(self.pairing.flush())
        return out

    # -- columnar view ------------------------------------------------------------------------
    def feed_batch(self, batch: RecordBatch) -> DecodeOutput:
        """Take a batch of records; return the tables of what they complete."""
        out: list = []
        payload = batch.payload.tobytes()
        pos = 0
        last_t = None
        for t, n, p, f in zip(batch.t_ns.tolist(), batch.length.tolist(), batch.port.tolist(),
                              batch.flags.tolist()):
            self._record(p, t, payload[pos:pos + n], f)
            pos += n
            last_t = t
        if last_t is not None:
            self._release(last_t - self._slack_ns, out)
        return DecodeOutput.from_objects(out)

    def flush(self) -> DecodeOutput:
        """End of input, as tables."""
        return DecodeOutput.from_objects(self.flush_events())

    # -- internals ----------------------------------------------------------------------------
    def _record(self, port: int, t_ns: int, data: bytes, flags: int) -> None:
        p = self.ports.get(port)
        if p is None:
            p = self.ports[port] = _Port(port, self.config)
        items: list = []
        p.marks(t_ns, data, flags, items)
        p.add(t_ns, data, flags, items)
        self._enqueue(p, items)

    def _enqueue(self, port: "_Port", items: list) -> None:
        # Keys never go back within one port: its items keep their stream order.
        for key, item in items:
            port.last_key = max(port.last_key, key)
            heapq.heappush(self._queue, (port.last_key, self._seq, item))
            self._seq += 1

    def _release(self, now_ns: int | None, out: list) -> None:
        """Hand items to pairing in time order, once no port can still produce an earlier one."""
        if now_ns is None:
            limit = None
        elif len(self.ports) == 1:
            limit = None
        else:
            opens = [t for t in (p.first_open_time() for p in self.ports.values()) if t is not None]
            limit = min([now_ns] + opens)
        q = self._queue
        while q and (limit is None or q[0][0] < limit):
            _key, _seq, item = heapq.heappop(q)
            if item[0] == "damage":
                out.append(self.pairing.on_damage(item[1]))
                continue
            _tag, port, raw, lo, hi, shape, gap, wire = item
            role = self.config.role_for(port)
            probe = Frame(port, raw, lo, hi, self.char_ns, wire_chars=wire)
            if role == "master":
                direction = "request"
            elif role == "slaves":
                direction = "response"
            else:
                direction = self.pairing.direction_of(probe, shape)
            frame = Frame(port, raw, lo, hi, self.char_ns, direction, wire)
            out.append(frame)
            if gap:
                out.append(Damage("gap_in_frame", port, frame.t_start_ns, raw, raw[0],
                                  f"a silence of at least {gap / 1e6:.3f} ms inside a frame (over t1.5)"))
            txns, events = self.pairing.on_frame(frame)
            out.extend(events)
            out.extend(txns)


def decode_source(source, config: DecoderConfig | None = None) -> Iterator[DecodeOutput]:
    """Decode every batch of a capture source, then the flush; one DecodeOutput per step."""
    cfg = config or DecoderConfig.from_header(source.header)
    dec = Decoder(cfg)
    for batch in source.iter_batches():
        yield dec.feed_batch(batch)
    yield dec.flush()


__all__ = ["Decoder", "DecoderConfig", "DecodeOutput", "decode_source", "REQUEST", "RESPONSE"]
