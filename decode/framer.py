"""RTU framing: cut one port's byte stream into CRC-valid frames and runs of damaged bytes.

Silence is a hint, the CRC is proof (TIMING.md). The stream is cut into *regions* where the
timestamps make a silence of at least t3.5 certain; inside a region frames are found by the
function code's length rules (:mod:`buswitness.decode.lengths`) checked with CRC-16/MODBUS.
Bytes that start no valid frame become a damage run; scanning resumes one byte later, so a
good frame right after noise is not lost. Every byte position is examined a bounded number
of times (at most one CRC search of up to 256 lengths, only at a region start or right after
a frame), so the time per byte is bounded and resynchronisation is linear.

A frame found in the middle of damaged bytes is accepted at once when its address is one
already seen in good frames; otherwise it must be *supported* (followed by another valid
frame or by a certain silence) or have fields within the specification's limits. That keeps
random noise from inventing stations.

*Idle-line bytes.* On a line without fail-safe bias each driver that switches off leaves one
byte behind its frame (FIELD-NOTES 21): often 0x00 after the master, 0xFE after a station,
usually marked with a framing error. CRC-16/MODBUS has residue zero, so "frame + 00" still
checks: the length rules choose the frame, never "the CRC is still zero one byte later". Such a
byte right after a frame end, marked or one of 0x00/0xFE/0xFF, followed by a frame or a
silence, becomes a span of its own (``Span.follows`` names the talker it follows).
"""

from __future__ import annotations

from bisect import bisect_left
from collections.abc import Sequence

from buswitness.decode.crc import CRC_TABLE, crc16_modbus
from buswitness.decode.lengths import (
    EITHER,
    MAX_FRAME,
    MIN_FRAME,
    PUBLIC_CODES,
    REQUEST,
    RESPONSE,
    SEARCH_CODES,
    answer_length,
    candidate_lengths,
    plausible,
)
from buswitness.decode.messages import Span

JUNK = 0
_NEED = -1
_NO = 0


def _valid(buf: bytes, p: int, n: int) -> bool:
    return crc16_modbus(buf[p:p + n]) == 0


#: Values a floating line leaves behind a frame when nothing marks them (FIELD-NOTES 21:
#: 0x00 after the master, 0xFE after a station; 0xFF is seen too).
IDLE_VALUES = frozenset({0x00, 0xFE, 0xFF})

_TABLE = CRC_TABLE.tolist()
_INVERSE = {v >> 8: i for i, v in enumerate(_TABLE)}  # the table's high bytes are all distinct


def _unstep(crc: int, byte: int) -> int:
    """The CRC register before the step that took in ``byte`` and gave ``crc``."""
    i = _INVERSE[crc >> 8]
    return (((crc ^ _TABLE[i]) << 8) & 0xFF00) | ((i ^ byte) & 0xFF)


class RegionScanner:
    """The sequential framer over a buffer, resumable as bytes arrive.

    State between calls: ``pos`` (next byte to examine), ``junk_start`` (start of a damage
    run whose end is not yet known) and ``anchored`` (``pos`` follows a frame or a silence).
    Positions are indices into the caller's buffer; :meth:`shift` rebases them when the
    caller drops bytes it no longer needs.
    """

    def __init__(self) -> None:
        self.pos = 0
        self.junk_start: int | None = None
        self.anchored = True
        self.known_addresses: set[int] = set()
        self.boundaries: list[int] = []
        self._search_at = -1  # position, bytes done and CRC register of a CRC search waiting for bytes
        self._search_len = 0
        self._search_crc = 0xFFFF
        self.marks: list[int] = []  # positions of bytes the UART marked bad (parity/framing error)
        self.breaks: list[int] = []  # positions before which a break (or a marked 0x00) was received
        self.one_way = 0  # REQUEST or RESPONSE on a port that hears one direction only
        # The frame before ``pos``: its bytes, whether it was taken as a request, and whether
        # ``pos`` is right at its end (where a driver lets go of the line).
        self.last_raw = b""
        self.last_request: bool | None = None
        self.after_frame = False

    def shift(self, n: int) -> None:
        self.pos -= n
        if self._search_at >= 0:
            self._search_at -= n
        if self.junk_start is not None:
            self.junk_start -= n
        self.boundaries = [b - n for b in self.boundaries if b - n > 0]
        if self.marks:
            self.marks = [m - n for m in self.marks if m - n >= 0]
        if self.breaks:
            self.breaks = [b - n for b in self.breaks if b - n >= 0]

    def add_mark(self, at: int) -> None:
        """``buf[at]`` arrived marked bad by the UART (a parity or framing error)."""
        if not self.marks or at > self.marks[-1]:
            self.marks.append(at)

    def add_break(self, at: int) -> None:
        """A break, or a 0x00 with a framing error (PARMRK tells them not apart), came before ``buf[at]``."""
        if not self.breaks or at > self.breaks[-1]:
            self.breaks.append(at)

    def note_frame(self, raw: bytes, shape: int, request: bool | None = None) -> bool:
        """Remember the frame that ends at ``pos``; return whether it is taken as a request.

        ``request`` is the caller's own judgement (the bulk walk's); without it the shape
        decides, and an echo-shaped frame is an answer when it repeats the address and code of
        a request just before it.
        """
        if request is None:
            if self.one_way:
                request = self.one_way != RESPONSE
            elif shape != EITHER:
                request = shape == REQUEST
            else:
                request = not (self.last_request and raw[0] == self.last_raw[0]
                               and (raw[1] & 0x7F) == (self.last_raw[1] & 0x7F))
        self.last_raw = bytes(raw)
        self.last_request = request
        self.after_frame = True
        return request

    @property
    def settled(self) -> int:
        """Bytes before this index are decided and may be dropped by the caller."""
        return self.pos if self.junk_start is None else self.junk_start

    def add_boundary(self, at: int) -> None:
        """A certain silence (or a discontinuity) lies before ``buf[at]``.

        Damage runs never cross it and the byte after it starts afresh; a frame may cross it
        only when its CRC proves the bytes on both sides belong together (a slow sender's
        pause inside a frame).
        """
        if not self.boundaries or at > self.boundaries[-1]:
            self.boundaries.append(at)

    def scan(self, buf: bytes, end: int, final: bool, out: list[Span], frames: int | None = None) -> None:
        """Examine ``buf[pos:end]``; ``final`` says no byte will follow ``end`` (end of input).

        With ``frames``, return early once that many frames were found and no damage run is
        open: the bulk path then takes over again.
        """
        found = 0
        bounds = self.boundaries
        bi = bisect_left(bounds, self.pos)
        while self.pos < end:
            if self.breaks:
                self._break_after_frame(out)
            while bi < len(bounds) and bounds[bi] < self.pos:
                bi += 1
            if bi < len(bounds) and bounds[bi] == self.pos:
                self._close_junk(out, True)
                self.anchored = True
                self.after_frame = False  # a byte after a certain silence is no driver letting go
                bi += 1
            if self.after_frame:
                idle = self._idle(buf, self.pos, end, final)
                if idle is None:
                    return
                if idle:
                    p = self.pos
                    out.append(Span(p, p + 1, JUNK, follows=(self.last_raw[0], bool(self.last_request))))
                    self.pos += 1
                    self.anchored = True
                    self.after_frame = False
                    continue
            res = self._match(buf, self.pos, end, final)
            if res == _NEED:
                return
            if res > 0:
                length, shape = res >> 2, res & 3
                self._close_junk(out, False)
                crosses = bi < len(bounds) and bounds[bi] < self.pos + length
                out.append(Span(self.pos, self.pos + length, shape, crosses=crosses))
                self.known_addresses.add(buf[self.pos])
                self.note_frame(buf[self.pos:self.pos + length], shape)
                self.pos += length
                self.anchored = True
                found += 1
                if frames is not None and found >= frames:
                    return
                continue
            if self.junk_start is None:
                self.junk_start = self.pos
            self.pos += 1
            self.anchored = False
            self.after_frame = False
            if self.pos - self.junk_start >= MAX_FRAME:
                self._close_junk(out, False)
        if self.breaks:
            self._break_after_frame(out)
        if final:
            self._close_junk(out, True)
            self.anchored = True

    def _break_after_frame(self, out: list[Span]) -> None:
        """A break mark right at a frame's end is the idle-line 0x00 of a driver letting go.

        PARMRK gives a 0x00 with a framing error and a break the same escape (``FF 00 00``,
        termios(3)), so the byte never reaches the buffer: it becomes an empty idle span.
        """
        i = bisect_left(self.breaks, self.pos)
        at_end = i < len(self.breaks) and self.breaks[i] == self.pos
        if at_end and self.after_frame and self.junk_start is None:
            out.append(Span(self.pos, self.pos, JUNK, follows=(self.last_raw[0], bool(self.last_request))))
            self.after_frame = False
            i += 1
        del self.breaks[:i]

    def _marked(self, q: int) -> bool:
        i = bisect_left(self.marks, q)
        return i < len(self.marks) and self.marks[i] == q

    def _idle_byte(self, buf: bytes, q: int) -> bool:
        """Could ``buf[q]`` be a byte a floating line left (marked bad, or 0x00/0xFE/0xFF)?"""
        return buf[q] in IDLE_VALUES or self._marked(q)

    def _idle(self, buf: bytes, p: int, end: int, final: bool) -> bool | None:
        """Is ``buf[p]``, right at a frame's end, an idle-line byte? None: not known yet.

        It is when a frame by rule or a certain silence follows it, and it does not itself
        start a frame by rule (a broadcast begins with 0x00).
        """
        if not self._idle_byte(buf, p):
            return False
        sup = self._follows(buf, p + 1, end, final)
        if not sup:
            return sup
        for length, _shape in candidate_lengths(buf, p, end) if end - p >= 2 else ():
            if length is not None and MIN_FRAME <= length <= min(MAX_FRAME, end - p) and _valid(buf, p, length):
                return False
        return True

    def _close_junk(self, out: list[Span], at_boundary: bool) -> None:
        if self.junk_start is not None and self.junk_start < self.pos:
            out.append(Span(self.junk_start, self.pos, JUNK, at_boundary))
        self.junk_start = None

    def _match(self, buf: bytes, p: int, end: int, final: bool) -> int:
        """``length << 2 | shape`` of the frame at ``p``, ``_NO``, or ``_NEED`` (wait for bytes)."""
        avail = end - p
        if avail < MIN_FRAME:
            if final:
                return _NO
            # Fewer than four bytes can still decide "no" when no rule allows a frame here.
            return _NEED
        need = False
        valid: list[tuple[int, int]] = []
        for length, shape in candidate_lengths(buf, p, end):
            if length is None:
                need = True
            elif MIN_FRAME <= length <= MAX_FRAME:
                if length > avail:
                    need = True
                elif _valid(buf, p, length):
                    valid.append((length, shape))
        if valid:
            if need and not final:
                return _NEED  # a longer rule is still open: the split that explains more may win
            return self._choose(buf, p, end, final, valid)
        fc = buf[p + 1]
        if self.anchored and not fc & 0x80 and (fc not in PUBLIC_CODES or fc in SEARCH_CODES):
            return self._search(buf, p, end, final)
        if need and not final:
            return _NEED
        return _NO

    def _choose(self, buf: bytes, p: int, end: int, final: bool, valid: list[tuple[int, int]]) -> int:
        """Pick among CRC-valid lengths at ``p``: the one a valid frame or a silence follows, else the longest.

        Two lengths can both be CRC-valid: a frame ending in 0x00 has a CRC-valid prefix one
        byte shorter (the CRC of 0x00 from a zero state stays zero), and request and response
        rules may coincide. The split that explains the most bytes wins.
        """
        valid = self._unglue(buf, p, valid)
        trusted = self.anchored or buf[p] in self.known_addresses
        undecided = False
        for length, shape in valid:
            sup = self._support(buf, p + length, end, final)
            if sup:
                return self._pick(valid, length, shape)
            undecided = undecided or sup is None
        if undecided and (len(valid) > 1 or not trusted):
            return _NEED
        length, shape = max(valid)
        if not trusted and not plausible(buf, p, length, shape):
            return _NO
        return self._pick(valid, length, shape)

    def _unglue(self, buf: bytes, p: int, valid: list[tuple[int, int]]) -> list[tuple[int, int]]:
        """Between CRC-valid lengths n and n + 1 (byte n is then 0x00), keep the one the rules and context give.

        Residue zero makes "frame + 00" check whenever a rule allows n + 1, and a floating line
        puts a 0x00 behind most master frames. The shorter frame stands, with the 0x00 apart,
        unless that byte is unmarked, the shorter frame does not repeat the frame before, and
        only the longer one fits what came before (the answer to the request just seen, or a
        request after an answer): a real frame whose CRC ends in 0x00 keeps its last byte.
        """
        lengths = {n for n, _ in valid}
        short = next((n for n in sorted(lengths) if n + 1 in lengths), None)
        if short is None:
            return valid
        longer = short + 1
        keep_longer = (not self._marked(p + short) and bytes(buf[p:p + short]) != self.last_raw
                       and self._fit(buf, p, longer, [s for n, s in valid if n == longer])
                       > self._fit(buf, p, short, [s for n, s in valid if n == short]))
        drop = short if keep_longer else longer
        return [(n, s) for n, s in valid if n != drop]

    def _fit(self, buf: bytes, p: int, length: int, shapes: list[int]) -> int:
        """How well a frame at ``p`` of this length and these shapes fits the frame before: 2 fits,
        1 cannot tell, 0 does not. An answer fits a request to its station with its code and,
        where the request fixes it, the answer's length (an FC03 answer carries 2 bytes per
        register asked for)."""
        best = 0
        for shape in shapes:
            if self.one_way:
                fit = 2 if shape in (self.one_way, EITHER) else 0
            elif self.last_request is None or shape == EITHER:
                fit = 1
            elif shape == RESPONSE:
                answer = (self.last_request and buf[p] == self.last_raw[0]
                          and (buf[p + 1] & 0x7F) == (self.last_raw[1] & 0x7F))
                if answer and not buf[p + 1] & 0x80:
                    expected = answer_length(self.last_raw)
                    answer = expected is None or expected == length
                fit = 2 if answer else 0
            else:
                fit = 1 if self.last_request else 2  # after a request, a retry or the next poll may come
            best = max(best, fit)
        return best

    @staticmethod
    def _pick(valid: list[tuple[int, int]], length: int, shape: int) -> int:
        if sum(1 for n, _ in valid if n == length) > 1:
            shape = EITHER
        return length << 2 | shape

    def _search(self, buf: bytes, p: int, end: int, final: bool) -> int:
        """CRC search for a code without a length rule: the shortest valid, supported split.

        The CRC register runs once over the bytes (one table step per byte, residue 0 marks a
        valid length); when the search must wait for bytes it keeps its place, so each byte
        is stepped at most once however the input is chunked.
        """
        if self._search_at == p:
            length, crc = self._search_len, self._search_crc
        else:
            length, crc = 0, 0xFFFF
        top = min(MAX_FRAME, end - p)
        table = _TABLE
        while length < top:
            crc = (crc >> 8) ^ table[(crc ^ buf[p + length]) & 0xFF]
            length += 1
            if crc == 0 and length >= MIN_FRAME:
                sup = self._support(buf, p + length, end, final)
                if sup is None:
                    self._search_at, self._search_len, self._search_crc = p, length - 1, _unstep(crc, buf[p + length - 1])
                    return _NEED
                if sup:
                    self._search_at = -1
                    return length << 2 | EITHER
        if top < MAX_FRAME and not final:
            self._search_at, self._search_len, self._search_crc = p, length, crc
            return _NEED
        self._search_at = -1
        return _NO

    def _support(self, buf: bytes, q: int, end: int, final: bool) -> bool | None:
        """Does a valid frame (by rule) or a certain silence follow at ``q``, directly or after
        one idle-line byte? None: not known yet."""
        direct = self._follows(buf, q, end, final)
        if direct or q >= end or not self._idle_byte(buf, q):
            return direct
        after = self._follows(buf, q + 1, end, final)
        if after:
            return True
        return None if direct is None or after is None else False

    def _follows(self, buf: bytes, q: int, end: int, final: bool) -> bool | None:
        """Does a valid frame (by rule) or a certain silence follow at ``q``? None: not known yet."""
        if q >= end:
            return True if final else None
        i = bisect_left(self.boundaries, q)
        if i < len(self.boundaries) and self.boundaries[i] == q:
            return True
        if end - q < 2:
            return None if not final else False
        undecided = False
        for length, _shape in candidate_lengths(buf, q, end):
            if length is None:
                undecided = True
            elif MIN_FRAME <= length <= MAX_FRAME:
                if q + length > end:
                    undecided = True
                elif _valid(buf, q, length):
                    return True
        if undecided and not final:
            return None
        return False


def split_frames(data: bytes) -> Sequence[Span]:
    """Frame a byte string with no timing at all (one region): frames and damage runs in order.

    The framing-only entry point: no timestamps, no pairing. The result is column-backed
    (``.start``, ``.end``, ``.shape`` numpy arrays) and iterates as :class:`Span` objects.
    """
    from buswitness.decode.bulk import split_spans

    return split_spans(data)


def explained_fraction(data: bytes) -> float:
    """Share of ``data``'s bytes that lie in CRC-valid RTU frames (0.0 for empty input).

    Used to rank baud-rate and format guesses: at the right settings nearly every byte of
    real traffic belongs to a valid frame; at wrong ones almost none do.
    """
    if not data:
        return 0.0
    spans = split_frames(data)
    covered = sum(s.end - s.start for s in spans if s.shape)
    return covered / len(data)
