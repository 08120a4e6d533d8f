"""The decoder facade: records in, frames, damage events and transactions out. No I/O.

``Decoder.feed`` takes one record and returns objects (for tests and small inputs);
``Decoder.feed_batch`` takes a :class:`~buswitness.records.RecordBatch` and returns
a :class:`DecodeOutput` of DataFrames laid out as ``docs/tables.md`` says. Both keep their
state between calls, so a frame may straddle two records or two batches, and ``flush``
closes whatever is still open at the end of the input.
"""

from __future__ import annotations

import heapq
from bisect import bisect_left, bisect_right
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from buswitness.decode.arrival import Timeline
from buswitness.decode.events import Damage, Frame
from buswitness.decode.messages import BulkRun, DamageMsg, FrameMsg, RegularRun, Span
from buswitness.decode.protocols import get as get_protocol
from buswitness.decode.protocols.base import EITHER, JUNK, REQUEST, RESPONSE, FieldProtocol
from buswitness.decode.rawbytes import RawSlices
from buswitness.decode.rawbytes import take as take_raws
from buswitness.decode.tables import (
    Collector,
    DecodeOutput,
    events_table,
    frames_table,
    transactions_table,
)
from buswitness.errors import UsageError
from buswitness.protocols import DEFAULT as DEFAULT_PROTOCOL
from buswitness.protocols import NAMES as PROTOCOLS
from buswitness.protocols import canonical
from buswitness.records import (
    FLAG_BREAK,
    FLAG_DISCONNECTED,
    FLAG_LINE_ERROR,
    FLAG_LOST,
    FLAG_PAUSED,
    FLAG_REOPENED,
    FLAG_UNTIMED,
    RecordBatch,
)
from buswitness.serial import SerialFormat

DEFAULT_LATENCY_MS = 16.0
DEFAULT_HOST_DELAY_MS = 1.0
PORT_ROLES = ("master", "slaves", "both")
#: Runs of flag-free records shorter than this go record by record.
BULK_MIN_BYTES = 2048

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
    protocol: str = DEFAULT_PROTOCOL
    untimed: bool = False
    port_roles: dict[int, str] = field(default_factory=dict)
    packet_bytes: int = 62

    def __post_init__(self) -> None:
        try:
            self.protocol = canonical(self.protocol)  # old names ("rtu", "ascii") are understood
        except ValueError:
            raise UsageError(f"protocol {self.protocol!r} is not one of {', '.join(PROTOCOLS)}") from None
        for port, role in self.port_roles.items():
            if role not in PORT_ROLES:
                raise UsageError(f"port {port} role {role!r} is not one of {', '.join(PORT_ROLES)} "
                                 f"(master: the port hears only the master; slaves: only the stations)")
        if not self.host_delay_ms >= 0:
            raise UsageError(f"host delay {self.host_delay_ms!r} ms must be zero or more")

    @classmethod
    def from_header(cls, header,
                    host_delay_ms: float | None = None, protocol: str | None = None,
                    port_roles: dict[int, str] | None = None) -> DecoderConfig:
        """Settings from a capture header; anything the header lacks gets the documented default.

        Port roles come from ``port_roles``, else from ``header.extra["port_roles"]``, else
        every port hears both directions (a two-wire bus).
        """
        latency = {p.id: float(p.latency_ms) if p.latency_ms else DEFAULT_LATENCY_MS for p in header.ports}
        roles = port_roles
        if roles is None:
            extra = header.extra.get("port_roles") or {}
            roles = {int(k): str(v) for k, v in extra.items()} if isinstance(extra, dict) else {}
        proto = protocol or str(header.extra.get("protocol", DEFAULT_PROTOCOL)).lower()
        delay = host_delay_ms
        if delay is None:
            delay = float(header.extra.get("host_delay_ms", DEFAULT_HOST_DELAY_MS))
        return cls(serial=header.serial, latency_ms=latency, host_delay_ms=delay, protocol=proto,
                   untimed=header.timing == "none", port_roles=roles)

    def latency_for(self, port: int) -> float:
        return self.latency_ms.get(port, DEFAULT_LATENCY_MS)

    def role_for(self, port: int) -> str:
        return self.port_roles.get(port, "both")

    @property
    def proto(self) -> FieldProtocol:
        """The protocol object (decode/protocols/) this configuration names."""
        return get_protocol(self.protocol)


class _Port:
    """One port's stream: unsettled bytes, the framer's state and the byte-time model."""

    #: When the bulk walk yields fewer frames than this, the sequential framer takes
    #: SEQUENTIAL_RUN frames before the walk is tried again (numpy's fixed cost per call
    #: outweighs runs of one frame, as behind every idle-line byte).
    BULK_SHORT_RUN = 2
    SEQUENTIAL_RUN = 64

    def __init__(self, port: int, cfg: DecoderConfig) -> None:
        self.port = port
        self.proto = proto = cfg.proto
        self.timing = timing = proto.timing(cfg.serial)
        self.char_ns = timing.char_ns
        self.t15_ns = timing.gap_in_frame_ns
        self.t35_ns = timing.frame_gap_ns
        self.cuts = timing.cuts_frames
        self.marking = proto.marks_bytes
        self.timeline = Timeline(self.char_ns, cfg.latency_for(port) * 1e6, cfg.host_delay_ms * 1e6,
                                 cfg.packet_bytes, cfg.untimed)
        self.untimed = cfg.untimed
        self.role = cfg.role_for(port)
        self.one_way = REQUEST if self.role == "master" else RESPONSE if self.role == "slaves" else 0
        self.scanner = proto.new_scanner(self.one_way)
        self.buf = bytearray()
        self.base = 0  # absolute stream position of buf[0]
        # record starts (absolute positions, increasing) with a silence over t1.5 before them
        self.silence_at: list[int] = []
        self.silence_ns: list[float] = []
        self.last_key = -(1 << 62)
        self.expect_response = False  # the bulk walk's guess for the next frame's direction
        self._marks: dict[str, list] = {}
        self._held: list[tuple[int, int, DamageMsg]] = []  # (stream position, time, event)
        self._merge_ns = cfg.latency_for(port) * 1e6 + cfg.host_delay_ms * 1e6 + 4 * self.char_ns
        self._last_end = (0, 0)  # end interval of the last frame handed on (for a break right behind it)

    def add(self, t_ns: int, data: bytes, flags: int, out: list) -> None:
        """Take one record; append (sort key, item) pairs for what it completes to ``out``."""
        if flags & FLAG_BREAK and self.marking:
            self.scanner.add_break(len(self.buf))
        if flags & _CUT_FLAGS:
            self._scan(False, out)
            self.scanner.add_boundary(len(self.buf))
        if data:
            self._silences(*self.timeline.add(t_ns, len(data)))
            if flags & FLAG_LINE_ERROR and self.marking:
                for k in range(len(self.buf), len(self.buf) + len(data)):
                    self.scanner.add_mark(k)
            self.buf.extend(data)
        self._scan(False, out)

    def flush(self, out: list) -> None:
        for kind in list(self._marks):
            self._close_mark(kind)
        self._silences(*self.timeline.finish())
        self._scan(True, out)

    def _silences(self, pos: np.ndarray, silence: np.ndarray) -> None:
        """Boundaries and silences before the reads the timeline has just judged (absolute ``pos``)."""
        if not pos.size:
            return
        if pos.size == 1:  # one read (the record-by-record path): no array work
            k, gap = int(pos[0]), float(silence[0])
            if self.cuts and gap > self.t35_ns:
                self.scanner.add_boundary(k - self.base)
            if gap > self.t15_ns:
                self.silence_at.append(k)
                self.silence_ns.append(gap)
            return
        if self.cuts:
            for k in pos[silence > self.t35_ns].tolist():
                self.scanner.add_boundary(k - self.base)
        over = silence > self.t15_ns
        if over.any():
            self.silence_at.extend(pos[over].tolist())
            self.silence_ns.extend(silence[over].tolist())

    def marks(self, t_ns: int, data: bytes, flags: int) -> None:
        """Turn record flags into events; consecutive marked records make one event with all their bytes.

        An event is held until the framer has settled the bytes before it, so it reaches
        pairing in stream order (after the request it may have hit, before what follows).
        """
        present = {kind for kind, bit in _MARKS if flags & bit}
        for kind in list(self._marks):
            run = self._marks[kind]
            if kind not in present and (data or t_ns - run[1] > self._merge_ns):
                self._close_mark(kind)
        for kind in present:
            pending = self._marks.get(kind)
            if pending is not None and t_ns - pending[1] <= self._merge_ns:
                pending[1] = t_ns
                pending[2] += data if kind == "line_error" else b""
            else:
                if pending is not None:
                    self._close_mark(kind)
                self._marks[kind] = [t_ns, t_ns, bytearray(data if kind == "line_error" else b""),
                                     self.base + len(self.buf)]

    def _close_mark(self, kind: str) -> None:
        t_first, _t_last, raw, pos = self._marks.pop(kind)
        # The marked bytes arrived within one adapter period before the first such read returned.
        t = int(t_first - self._merge_ns / 2)
        self._held.append((pos, t, DamageMsg(Damage(kind, self.port, t, bytes(raw), -1, _MARK_TEXT[kind]))))

    def _unmark(self, pos: int, kind: str) -> bool:
        """Take the byte at absolute ``pos`` out of the ``kind`` event (line_error, break) holding it;
        True if there was one.

        An idle-line byte is its own event: the mark the UART gave it is not a line error, and
        the break PARMRK reports for a marked 0x00 is no break.
        """
        def holds(first: int, raw: bytes) -> bool:
            return first == pos if kind == "break" else first <= pos < first + len(raw)

        run = self._marks.get(kind)
        if run is not None and holds(run[3], run[2]):
            self._close_mark(kind)
        for entry in self._held:
            first, t, msg = entry
            damage = msg.damage
            if damage.kind == kind and holds(first, damage.raw):
                self._held.remove(entry)
                k = pos - first
                for start, raw in ((first, damage.raw[:k]), (pos + 1, damage.raw[k + 1:])):
                    if raw:
                        part = Damage(damage.kind, damage.port, damage.t_ns, raw, damage.station, damage.detail)
                        self._held.append((start, t, DamageMsg(part)))
                return True
        return False

    def _held_before(self, pos: int | None, settled: bool = False) -> list:
        """Held events whose bytes start before absolute ``pos`` (all of them for None).

        With ``settled`` (``pos`` is where the framer stopped), a line-error or break mark right
        after a frame stays held: the framer may yet call that byte an idle-line byte.
        """
        if not self._held:
            return []
        if pos is None:
            ready, self._held = self._held, []
        else:
            undecided = settled and self.marking and self.scanner.after_frame

            def due(h: tuple) -> bool:
                if h[0] != pos:
                    return h[0] < pos
                return not (undecided and h[2].damage.kind in ("line_error", "break"))

            ready = [h for h in self._held if due(h)]
            self._held = [h for h in self._held if not due(h)]
        return [(t, msg) for _pos, t, msg in sorted(ready, key=lambda h: h[0])]

    def _span_items(self, span: Span) -> list:
        """A span as queue items, with the held events that come before it."""
        marked = span.follows is not None and self._unmark(self.base + span.start,
                                                           "break" if span.start == span.end else "line_error")
        return self._held_before(self.base + span.start) + [self._item(span, marked)]

    def has_marks(self) -> bool:
        return bool(self._marks or self._held)

    def first_open_time(self) -> int | None:
        """Earliest time an item this port still holds back could carry (None: holds nothing)."""
        settled = self.scanner.settled
        if settled >= len(self.buf):
            return None
        lo, _hi = self.timeline.end_bounds(self.base + settled, self.base + settled)
        return lo - int(self.char_ns)

    def add_bulk(self, t_ns: np.ndarray, n: np.ndarray, payload: bytes, pieces: list) -> None:
        """Take many flag-free records, each with bytes, at once; append pieces in stream order.

        A piece is a list of ``(key, message)`` pairs from the sequential framer or a
        :class:`BulkRun` from the protocol's bulk path.
        """
        self._silences(*self.timeline.add_many(t_ns, n))
        self.buf.extend(payload)
        self._scan_bulk(pieces)

    def _scan_bulk(self, pieces: list) -> None:
        self._scan_bulk_to(self._scan_end(), pieces)
        self._trim()

    def _scan_bulk_to(self, end: int, pieces: list) -> None:
        sc = self.scanner
        bulk = self.proto.bulk
        buf = bytes(memoryview(self.buf)[:end])  # one copy (a bytearray slice would be a second)
        arr = np.frombuffer(buf, dtype=np.uint8)
        # The bulk path never runs a frame across a certain silence or a silence over t1.5:
        # those frames need the sequential framer's judgement and events.
        silences = np.asarray(self.silence_at, dtype=np.int64) - self.base
        stops = np.union1d(np.asarray(sc.boundaries, dtype=np.int64), silences)
        # A silence the read after it explains as a held-up read (Timeline.held_up) does not stop
        # a frame (that read is always known: _scan_end), whether or not it was long enough to be
        # a boundary: the sequential framer matches a frame across a boundary when its check holds,
        # and _item forgives the same silences. A boundary that is no silence (a discontinuity)
        # always stops.
        forgiven = np.full(stops.shape[0], -1, dtype=np.int64)
        if stops.size and not self.untimed:
            soft = np.isin(stops, silences)
            if soft.any():
                forgiven[soft] = self.timeline.held_up(stops[soft] + self.base) - self.base
                forgiven[soft & (forgiven < 0)] = -1
        make_walker = getattr(bulk, "walker", None)
        walker = make_walker(buf, arr, end, self.one_way) if make_walker is not None else None
        while True:
            progressed = False
            run = 2  # frames the sequential framer takes before the bulk walk tries again
            held = self._held_before(self.base + sc.settled, settled=True)
            if held:
                pieces.append(held)
            if sc.junk_start is None:
                if walker is not None:
                    starts, lens, shapes, expect, addrs, fcs = walker.spans(sc.pos, self.expect_response)
                else:
                    starts, lens, shapes, expect, addrs, fcs = bulk.spans(buf, arr, sc.pos, end,
                                                                          self.expect_response, self.one_way)
                keep = starts.size
                if keep and self._held:
                    # stop before the first frame that comes after a held event's bytes
                    keep = int(np.searchsorted(starts, min(h[0] for h in self._held) - self.base, "left"))
                if keep and sc.breaks:
                    # and before the first frame from a break mark on: the sequential framer judges the
                    # mark (the idle-line 0x00 of a driver letting go, when it is right behind a frame)
                    later = bisect_left(sc.breaks, sc.pos)
                    if later < len(sc.breaks):
                        keep = min(keep, int(np.searchsorted(starts, sc.breaks[later], "left")))
                if keep and stops.size:
                    # and before the first frame with a stop inside it that its own reads do not explain away
                    f = np.searchsorted(starts, stops, "right") - 1
                    valid = f >= 0
                    fv = np.maximum(f, 0)
                    ends_f = starts[fv] + lens[fv]
                    inside = valid & (stops > starts[fv]) & (stops < ends_f)
                    inside &= forgiven < 0
                    if inside.any():
                        keep = min(keep, int(f[inside].min()))
                if keep < starts.size:
                    starts, lens, shapes, addrs, fcs = (starts[:keep], lens[:keep], shapes[:keep], addrs[:keep],
                                                        fcs[:keep])
                    expect = bool(shapes[-1] != RESPONSE) if keep else self.expect_response
                if starts.size:
                    raws = (bulk.frame_bytes(buf, starts, lens) if hasattr(bulk, "frame_bytes")
                            else RawSlices(buf, starts, lens))
                    first = starts + self.base
                    lo, hi = self.timeline.end_bounds_many(first, first + lens - 1)
                    self._last_end = (int(lo[-1]), int(hi[-1]))
                    pieces.append(BulkRun(lo, hi, lens, shapes, addrs, fcs, raws))
                    sc.pos = int(starts[-1] + lens[-1])
                    bulk.after_run(sc, raws, shapes, addrs)
                    self.expect_response = expect
                    progressed = True
                if starts.size < self.BULK_SHORT_RUN:
                    # Traffic the walk cannot follow for long (an idle-line byte behind every frame):
                    # the sequential framer goes on further than the usual two frames.
                    run = self.SEQUENTIAL_RUN
            spans: list[Span] = []
            before = sc.pos
            sc.scan(buf, end, False, spans, frames=run)
            if spans:
                items: list = []
                for span in spans:
                    items.extend(self._span_items(span))
                pieces.append(items)
                for span in reversed(spans):
                    if span.shape:
                        self.expect_response = (span.shape == REQUEST if span.shape != EITHER
                                                else not self.expect_response)
                        break
            if spans or sc.pos != before:
                progressed = True
            if not progressed:
                break

    def bulk_items(self, run: BulkRun) -> list:
        """A bulk run as queue items, for pairing in time order with other ports."""
        lo, hi = run.lo, run.hi
        base = lo if self.role == "master" else hi if self.role == "slaves" else (lo + hi) // 2
        keys = (base - np.rint(run.lens * self.char_ns).astype(np.int64)).tolist()
        return [(k, FrameMsg(self.port, raw, a, b, sh, 0.0, _wire(raw, n)))
                for k, raw, a, b, sh, n in zip(keys, run.raws, lo.tolist(), hi.tolist(), run.shapes.tolist(),
                                               run.lens.tolist())]

    def _scan_end(self) -> int:
        """Where the framer stops: the start of the last read, which the timeline has yet to judge.

        A read is bounded by the read after it (Timeline.add_many: a read held up in the host,
        the parts of one read), so a frame touching the last read waits for the next record,
        however the records are cut into calls; :meth:`flush` frames the rest. An untimed
        capture has no times to judge and is framed to the end.
        """
        if self.untimed:
            return len(self.buf)
        return max(0, self.timeline.pending_start() - self.base)

    def _scan(self, final: bool, out: list) -> None:
        spans: list[Span] = []
        end = len(self.buf) if final else self._scan_end()
        self.scanner.scan(self.buf, end, final, spans)
        for span in spans:
            out.extend(self._span_items(span))
        out.extend(self._held_before(None if final else self.base + self.scanner.settled, settled=True))
        self._trim()

    def _trim(self) -> None:
        settled = self.scanner.settled
        if settled:
            del self.buf[:settled]
            self.base += settled
            self.scanner.shift(settled)
            self.timeline.drop_before(self.base)
            gone = bisect_left(self.silence_at, self.base)
            if gone:
                del self.silence_at[:gone], self.silence_ns[:gone]

    def _item(self, span: Span, marked: bool = False) -> tuple[int, FrameMsg | DamageMsg]:
        a, b = self.base + span.start, self.base + span.end
        raw = bytes(self.buf[span.start:span.end])
        if a == b:  # a break mark right behind a frame: the marked 0x00 one character after its last byte
            raw = b"\x00"
            lo, hi = (x + round(self.char_ns) for x in self._last_end)
        else:
            lo, hi = self.timeline.end_bounds(a, b - 1)
        if span.shape == JUNK:
            # Damaged bytes are mostly one talker's back-to-back bytes: bound them like a frame.
            t = (lo + hi) // 2 - round(len(raw) * self.char_ns)
            if span.follows is not None:
                text = self.proto.describe_idle(raw, span.follows, marked)
            else:
                text = self.proto.describe_damage(raw, span.at_boundary)
            return t, DamageMsg(Damage(text.kind, self.port, t, raw, text.station, text.detail))
        self._last_end = (lo, hi)
        first, stop = bisect_right(self.silence_at, a), bisect_left(self.silence_at, b)
        gaps = self.silence_ns[first:stop]
        if gaps and not self.untimed:
            # a silence shown only by a read the host held up is no silence on the wire, when
            # the read after it gives the hold-up away (Timeline.held_up; known here: _scan_end)
            nxt = self.timeline.held_up(np.asarray(self.silence_at[first:stop]))
            gaps = [g for g, n in zip(gaps, nxt.tolist()) if n < 0]
        # Sort key among ports: a master's frame by its earliest start, a station's by its latest,
        # so an answer never sorts before the request it answers, however coarse the timestamps.
        base = lo if self.role == "master" else hi if self.role == "slaves" else (lo + hi) // 2
        t_start = base - round(len(raw) * self.char_ns)
        raw, wire = self.proto.unwrap(raw)
        if not self.cuts:
            gaps = []
        return t_start, FrameMsg(self.port, raw, lo, hi, span.shape, max(gaps) if gaps else 0.0, wire)


@dataclass
class _Block:
    """The frames of one bulk run of a one-direction port (four-wire bus), queued whole.

    Element ``k`` (from ``start`` on) sorts as ``(keys[k], seq0 + k)`` among the queue's items,
    exactly where :meth:`_Port.bulk_items` would have put it as an item of its own.
    """

    port: int
    role: str
    run: BulkRun
    keys: np.ndarray
    seq0: int
    start: int = 0

    def head(self) -> tuple[int, int]:
        return int(self.keys[self.start]), self.seq0 + self.start


@dataclass
class _Columns:
    """Column chunks among the objects of a release, in stream order (see :func:`_collect`)."""

    frames: dict | None = None
    transactions: dict | None = None


def _wire(raw: bytes, chars: int) -> int:
    """A bulk frame's characters on the wire for FrameMsg: 0 where they are its bytes (RTU), else their count."""
    return 0 if len(raw) == chars else chars


def _raw_lengths(raws: list, lens: np.ndarray) -> np.ndarray:
    """The frames table's lengths (bytes of ``raw``) of bulk frames whose ``lens`` count wire characters."""
    if not raws or len(raws[0]) == int(lens[0]) and len(raws[-1]) == int(lens[-1]):
        return lens
    return np.fromiter(map(len, raws), dtype=np.int64, count=len(raws))


def _collect(col: Collector, out: list) -> None:
    """Objects and :class:`_Columns` of a release into ``col``, keeping their order."""
    start = 0
    for k, x in enumerate(out):
        if isinstance(x, _Columns):
            col.add_objects(out[start:k])
            start = k + 1
            if x.transactions is not None:
                col.add_transaction_columns(x.transactions)
            if x.frames is not None:
                col.add_frame_columns(x.frames)
    col.add_objects(out[start:])


class Decoder:
    """Sans-I/O decoder over one capture's records (all ports)."""

    #: Frames of one-direction ports (four-wire bus) meet at pairing as columns; False: one by one
    #: (the reference the columnar path is tested against, tests/test_fourwire_columns.py).
    COLUMNAR_PORTS = True
    #: Frames that go one by one after the columnar pairing of two ports found nothing to take
    #: (doubling while it keeps finding nothing), and the frames its first attempt looks at.
    FRAMEWISE_RUN = 8
    COLUMN_WINDOW = 256

    def __init__(self, config: DecoderConfig | None = None) -> None:
        self.config = config or DecoderConfig()
        self.ports: dict[int, _Port] = {}
        self.proto = self.config.proto
        timing = self.proto.timing(self.config.serial)
        self.char_ns = timing.char_ns
        # No timeout here: pairing records what the wire shows, the analysis judges it (one timeout).
        self.pairing = self.proto.new_pairing(timing, not self.config.untimed)
        self._frame = getattr(self.proto, "make_frame", Frame)
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
        """Take a batch of records; return the tables of what they complete.

        Runs of flag-free records on a single RTU port go through the bulk path (columns all
        the way); everything else goes record by record. Both give the same results.
        """
        col = Collector()
        count = len(batch)
        if count == 0:
            return col.output(self.proto)
        payload = batch.payload.tobytes()
        offsets = batch.offsets
        lengths = batch.length
        ports = np.flatnonzero(np.bincount(batch.port))  # the ports present, ascending (port numbers are one byte)
        single = ports.size == 1 and set(self.ports) <= {int(ports[0])} and self.proto.bulk is not None
        plain = ((batch.flags & ~np.uint8(FLAG_UNTIMED)) == 0) & (lengths > 0)
        if not single:
            # Several ports: each port's stream is framed on its own (bulk where it can), then
            # everything meets in time order at pairing, as far as every port has settled.
            for port in ports.tolist():
                self._port_records(np.flatnonzero(batch.port == port), batch, payload, offsets, plain, None)
            out: list = []
            self._release(int(batch.t_ns[-1]) - self._slack_ns, out, columns=True)
            _collect(col, out)
            return col.output(self.proto)
        self._port_records(np.arange(count), batch, payload, offsets, plain, col)
        return col.output(self.proto)

    def _port_records(self, idx: np.ndarray, batch: RecordBatch, payload: bytes, offsets: np.ndarray,
                      plain: np.ndarray, col: Collector | None) -> None:
        """Records ``idx`` of one port, bulk for long flag-free runs; ``col`` None: leave items queued."""
        mask = plain[idx]
        edges = np.flatnonzero(np.diff(np.concatenate(([0], mask.astype(np.int8), [0]))))
        pos = 0
        for run_start, run_end in zip(edges[::2].tolist(), edges[1::2].tolist()):
            sel = idx[run_start:run_end]
            if self.proto.bulk is None or int(batch.length[sel].sum()) < BULK_MIN_BYTES:
                continue  # numpy's fixed cost per call outweighs the gain on short runs
            self._records(idx[pos:run_start], batch, payload, offsets, col)
            self._bulk_run(sel, batch, payload, offsets, col)
            pos = run_end
        self._records(idx[pos:], batch, payload, offsets, col)

    def _records(self, idx: np.ndarray, batch: RecordBatch, payload: bytes, offsets: np.ndarray,
                 col: Collector | None) -> None:
        if not idx.size:
            return
        for i in idx.tolist():
            o, n = int(offsets[i]), int(batch.length[i])
            self._record(int(batch.port[i]), int(batch.t_ns[i]), payload[o:o + n], int(batch.flags[i]))
        if col is not None:
            out: list = []
            self._release(None, out)
            col.add_objects(out)

    def _bulk_run(self, sel: np.ndarray, batch: RecordBatch, payload: bytes, offsets: np.ndarray,
                  col: Collector | None) -> None:
        p = self._port(int(batch.port[sel[0]]))
        t_ns = batch.t_ns[sel]
        lengths = batch.length[sel]
        if sel[-1] - sel[0] + 1 == sel.size:
            data = payload[int(offsets[sel[0]]):int(offsets[sel[-1]] + lengths[-1])]
        else:
            picked = np.zeros(len(batch), dtype=bool)
            picked[sel] = True  # the records of one port among several: their bytes in one gather
            data = batch.payload[np.repeat(picked, batch.length)].tobytes()
        if p.has_marks():
            p.marks(int(t_ns[0]), data, 0)
        pieces: list = []
        p.add_bulk(t_ns, lengths, data, pieces)
        for piece in pieces:
            if not isinstance(piece, BulkRun):
                self._enqueue(p, piece)
                if col is not None:
                    out: list = []
                    self._release(None, out)
                    col.add_objects(out)
            elif col is not None:
                self._bulk_frames(p, piece, col)
            elif p.role != "both" and self.COLUMNAR_PORTS:
                self._enqueue_run(p, piece)
            else:
                self._enqueue(p, p.bulk_items(piece))

    def _bulk_frames(self, p: _Port, run: BulkRun, col: Collector) -> None:
        """Frames from the bulk path: times in columns, pairing in columns where traffic is regular."""
        lo, hi, lens, shapes, addrs, fcs, raws = run.lo, run.hi, run.lens, run.shapes, run.addrs, run.fcs, run.raws
        c = self.char_ns
        t_end = (lo + hi) // 2
        t_start = t_end - np.rint(lens * c).astype(np.int64)
        m = lens.shape[0]
        directions = np.full(m, 2, dtype=np.int8)
        p.last_key = max(p.last_key, int(t_start[-1]))
        role = self.config.role_for(p.port)
        pr = self.pairing
        i = 0
        while i < m:
            if role == "both" and pr.is_quiet():
                pairs = pr.regular_run(shapes[i:], addrs[i:], fcs[i:])
                if pairs:
                    j = i + 2 * pairs
                    columns, events = pr.pair_regular(RegularRun(p.port, run, t_start, t_end, c, i, j))
                    col.add_transaction_columns(columns)
                    col.add_objects(events)
                    directions[i:j:2] = 0
                    directions[i + 1:j:2] = 1
                    i = j
                    continue
            out: list = []
            frame = self._deliver(FrameMsg(p.port, raws[i], int(lo[i]), int(hi[i]), int(shapes[i]), 0.0,
                                           _wire(raws[i], int(lens[i]))), out, keep_frame=False)
            directions[i] = 0 if frame.direction == "request" else 1 if frame.direction == "response" else 2
            col.add_objects(out)
            i += 1
        col.add_frame_columns({
            "t_start_ns": t_start, "t_end_ns": t_end, "t_end_lo_ns": lo, "t_end_hi_ns": hi,
            "port": np.full(m, p.port, dtype=np.uint8), "address": addrs, "function": fcs,
            "length": _raw_lengths(raws, lens), "direction": directions, "raw": raws,
        })

    def flush(self) -> DecodeOutput:
        """End of input, as tables."""
        return DecodeOutput.from_objects(self.flush_events(), self.proto)

    # -- internals ----------------------------------------------------------------------------
    def _port(self, port: int) -> _Port:
        p = self.ports.get(port)
        if p is None:
            p = self.ports[port] = _Port(port, self.config)
        return p

    def _record(self, port: int, t_ns: int, data: bytes, flags: int) -> None:
        p = self._port(port)
        items: list = []
        p.marks(t_ns, data, flags)
        p.add(t_ns, data, flags, items)
        self._enqueue(p, items)

    def _enqueue(self, port: _Port, items: list) -> None:
        # Keys never go back within one port: its items keep their stream order.
        for key, item in items:
            port.last_key = max(port.last_key, key)
            heapq.heappush(self._queue, (port.last_key, self._seq, item))
            self._seq += 1

    def _release(self, now_ns: int | None, out: list, columns: bool = False) -> None:
        """Hand items to pairing in time order, once no port can still produce an earlier one.

        With ``columns``, frames of queued runs (:class:`_Block`) may go to ``out`` as column chunks
        (:class:`_Columns`, for :func:`_collect`); without, every frame is an object."""
        if now_ns is None or len(self.ports) == 1:
            limit = None
        else:
            opens = [t for t in (p.first_open_time() for p in self.ports.values()) if t is not None]
            limit = min([now_ns] + opens)
        q = self._queue
        while q and (limit is None or q[0][0] < limit):
            _key, _seq, item = heapq.heappop(q)
            if isinstance(item, _Block):
                self._release_block(item, limit, out, columns)
                continue
            if isinstance(item, DamageMsg):
                out.append(self.pairing.on_damage(item.damage))
                out.extend(self.pairing.collisions(item.damage))
                continue
            self._deliver(item, out)

    def _deliver(self, msg: FrameMsg, out: list, keep_frame: bool = True) -> Frame:
        """One frame into pairing; its events and finished transactions (and the frame) go to ``out``."""
        port, raw, lo, hi, shape, gap, wire = (msg.port, msg.raw, msg.t_end_lo_ns, msg.t_end_hi_ns, msg.shape,
                                               msg.gap_ns, msg.wire_chars)
        role = self.config.role_for(port)
        if role == "master":
            direction = "request"
        elif role == "slaves":
            direction = "response"
        else:
            direction = self.pairing.direction_of(self._frame(port, raw, lo, hi, self.char_ns, "unknown", wire), shape)
        frame = self._frame(port, raw, lo, hi, self.char_ns, direction, wire)
        if keep_frame:
            out.append(frame)
        if gap:
            out.append(Damage("gap_in_frame", port, frame.t_start_ns, raw, frame.address,
                              f"a silence of at least {gap / 1e6:.3f} ms inside a frame (over t1.5)"))
        txns, events = self.pairing.on_frame(frame)
        out.extend(events)
        out.extend(txns)
        return frame

    # -- four-wire: frames of one-direction ports merged and paired in columns -------------------
    def _enqueue_run(self, p: _Port, run: BulkRun) -> None:
        """Queue a bulk run of a one-direction port whole, keyed as :meth:`_enqueue` keys each frame."""
        base = run.lo if p.role == "master" else run.hi
        keys = np.maximum.accumulate(np.maximum(base - np.rint(run.lens * p.char_ns).astype(np.int64), p.last_key))
        p.last_key = int(keys[-1])
        blk: Any = _Block(p.port, p.role, run, keys, self._seq)
        heapq.heappush(self._queue, (int(keys[0]), self._seq, blk))
        self._seq += len(run)

    def _release_block(self, blk: _Block, limit: int | None, out: list, columns: bool) -> None:
        """Release the frames of ``blk`` (just popped) that come before every other queued item and ``limit``.

        With ``columns``, a run of the other port queued right behind it is merged in: the
        frames of both, in queue order, are paired in columns where they are regular.
        """
        q = self._queue
        blocks: list[_Block] = [blk]
        nxt: Any = q[0][2] if q else None
        if columns and isinstance(nxt, _Block) and nxt.port != blk.port:
            heapq.heappop(q)
            blocks.append(nxt)
        keys = np.concatenate([b.keys[b.start:] for b in blocks])
        seqs = np.concatenate([np.arange(b.seq0 + b.start, b.seq0 + len(b.run), dtype=np.int64) for b in blocks])
        which = np.repeat(np.arange(len(blocks)), [len(b.run) - b.start for b in blocks])
        order = np.lexsort((seqs, keys))
        keys, seqs = keys[order], seqs[order]
        take = keys.size
        if limit is not None:
            take = int(np.searchsorted(keys, limit, "left"))
        if q:
            nk, ns = q[0][0], q[0][1]
            first, past = np.searchsorted(keys, nk, "left"), np.searchsorted(keys, nk, "right")
            take = min(take, int(first + np.searchsorted(seqs[first:past], ns, "left")))
        order, which = order[:take], which[order[:take]]
        picks = []
        offset = 0
        for k, part in enumerate(blocks):
            mine = order[which == k] - offset + part.start  # element numbers of the part, in order
            offset += len(part.run) - part.start
            picks.append(mine)
            part.start += mine.size
            if part.start < len(part.run):
                key, seq = part.head()
                rest: Any = part
                heapq.heappush(q, (key, seq, rest))
        if take:
            self._deliver_merged(blocks, which, picks, out, columns)

    def _deliver_merged(self, blocks: list[_Block], which: np.ndarray, picks: list[np.ndarray], out: list,
                        columns: bool) -> None:
        """Frames of queued runs into pairing in queue order (``which`` block each comes from)."""
        m = which.size
        slot = [np.flatnonzero(which == k) for k in range(len(blocks))]

        def gather(name: str, dtype) -> np.ndarray:
            col = np.empty(m, dtype=dtype)
            for b, s, pick in zip(blocks, slot, picks):
                col[s] = getattr(b.run, name)[pick]
            return col

        lo, hi, lens = gather("lo", np.int64), gather("hi", np.int64), gather("lens", np.int64)
        addrs, fcs = gather("addrs", np.uint8), gather("fcs", np.uint8)
        ports = np.empty(m, dtype=np.uint8)
        shapes = np.empty(m, dtype=np.int8)
        merged = np.empty(m, dtype=object)
        for b, s, pick in zip(blocks, slot, picks):
            ports[s] = b.port
            shapes[s] = REQUEST if b.role == "master" else RESPONSE
            got = np.empty(pick.size, dtype=object)
            got[:] = take_raws(b.run.raws, pick)
            merged[s] = got
        raws: list = merged.tolist()
        if not columns:
            for k in range(m):
                self._deliver(FrameMsg(int(ports[k]), raws[k], int(lo[k]), int(hi[k]), int(shapes[k]), 0.0,
                                       _wire(raws[k], int(lens[k]))), out)
            return
        c = self.char_ns
        t_end = (lo + hi) // 2
        t_start = t_end - np.rint(lens * c).astype(np.int64)
        directions = np.where(shapes == REQUEST, 0, 1).astype(np.int8)
        run = BulkRun(lo, hi, lens, shapes, addrs, fcs, raws)
        req_port = next((b.port for b in blocks if b.role == "master"), -1)
        rsp_port = next((b.port for b in blocks if b.role == "slaves"), -1)
        is_req = shapes == REQUEST
        pr = self.pairing
        i = 0
        retry_at = 0  # after a columnar attempt that took nothing, some frames go one by one first
        backoff = self.FRAMEWISE_RUN
        window = self.COLUMN_WINDOW  # frames one attempt looks at: doubles while attempts take them all
        while i < m:
            if req_port >= 0 and rsp_port >= 0 and i >= retry_at:
                end = min(m, i + window)
                j, cols, events = pr.pair_two_port(RegularRun(rsp_port, run, t_start, t_end, c, i, end, req_port),
                                                   is_req)
                if cols is not None:
                    out.append(_Columns(transactions=cols))
                out.extend(events)
                if j > i:
                    window = window * 2 if j == end else self.COLUMN_WINDOW
                    backoff = self.FRAMEWISE_RUN
                    i = j
                    continue
                retry_at = i + backoff
                backoff = min(2 * backoff, 32 * self.FRAMEWISE_RUN)
                window = self.COLUMN_WINDOW
            self._deliver(FrameMsg(int(ports[i]), raws[i], int(lo[i]), int(hi[i]), int(shapes[i]), 0.0,
                                   _wire(raws[i], int(lens[i]))), out, keep_frame=False)
            i += 1
        out.append(_Columns(frames={
            "t_start_ns": t_start, "t_end_ns": t_end, "t_end_lo_ns": lo, "t_end_hi_ns": hi, "port": ports,
            "address": addrs, "function": fcs, "length": _raw_lengths(raws, lens), "direction": directions,
            "raw": raws,
        }))


#: Reader batches are joined up to about this many records (or JOIN_BYTES bytes) before decoding:
#: a recording flushes a block a second, and the decoder's cost per call outweighs a second's records.
#: (1 h at 115200 from a 1 ms adapter, one pass, best of 3 in one process: 1.12 s at 16k records,
#: 0.96 s at 64k, 0.81 s at 128k; peak memory 183, 211, 225 MB. The same hour as hex text, whose
#: first 300k records are also kept for the latency sample: 206, 252, 341 MB. 64k it is.)
JOIN_RECORDS = 1 << 16
JOIN_BYTES = 4 << 20


def joined_batches(batches: Iterable[RecordBatch], records: int = JOIN_RECORDS,
                   nbytes: int = JOIN_BYTES) -> Iterator[RecordBatch]:
    """Consecutive batches joined into larger ones (same records, same order).

    The decoder's tables do not depend on where its input is cut (tests/test_decode_scenarios_equal.py),
    so a file read block by block decodes the same, in fewer and larger steps.
    """
    pending: list[RecordBatch] = []
    count = size = 0
    for batch in batches:
        if not len(batch):
            continue
        pending.append(batch)
        count += len(batch)
        size += int(batch.payload.shape[0])
        if count >= records or size >= nbytes:
            yield RecordBatch.concat(pending)
            pending, count, size = [], 0, 0
    if pending:
        yield RecordBatch.concat(pending)


def decode_source(source, config: DecoderConfig | None = None) -> Iterator[DecodeOutput]:
    """Decode every batch of a capture source (joined into larger steps), then the flush."""
    cfg = config or DecoderConfig.from_header(source.header)
    dec = Decoder(cfg)
    for batch in joined_batches(source.iter_batches()):
        yield dec.feed_batch(batch)
    yield dec.flush()


__all__ = [
    "DecodeOutput",
    "Decoder",
    "DecoderConfig",
    "decode_source",
    "events_table",
    "frames_table",
    "transactions_table",
]
