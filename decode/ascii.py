"""Modbus ASCII framing: ``:`` hex-pairs LRC CR LF (MSL V1.02 section 2.5.2).

The scanner has the same interface as the RTU :class:`~buswitness.decode.framer.RegionScanner`
so the decoder treats both alike. A frame's ``raw`` is its decoded binary form: address,
PDU and the LRC byte; the frame remembers how many characters it took on the wire. A new
``:`` discards the frame in progress, as the specification says; anything else that forms
no LRC-valid frame is a damage run.
"""

from __future__ import annotations

from buswitness.decode.framer import JUNK, Span
from buswitness.decode.lengths import EITHER, candidate_lengths

#: Longest ASCII frame on the wire (MSL V1.02 section 2.5.2.1).
MAX_ASCII_CHARS = 513
_HEX = frozenset(b"0123456789ABCDEFabcdef")


def decode_ascii_frame(wire: bytes) -> bytes | None:
    """The binary content (address, PDU, LRC) of ``:...\\r\\n``, or None when it is not a valid frame."""
    if len(wire) < 9 or wire[:1] != b":" or wire[-2:] != b"\r\n":
        return None
    body = wire[1:-2]
    if len(body) % 2 or not all(ch in _HEX for ch in body):
        return None
    data = bytes.fromhex(body.decode("ascii"))
    if sum(data) & 0xFF:
        return None
    return data


def ascii_shape(data: bytes) -> int:
    """Request/response shape of a decoded ASCII frame, by the RTU length rules it would have."""
    rtu_len = len(data) + 1  # LRC (1 byte) in place of CRC (2 bytes)
    padded = data + b"\x00"
    shapes = {shape for length, shape in candidate_lengths(padded, 0, len(padded)) if length == rtu_len}
    if len(shapes) == 1:
        return shapes.pop()
    return EITHER


class AsciiScanner:
    """Find ASCII frames in a byte buffer, resumable as bytes arrive."""

    def __init__(self) -> None:
        self.pos = 0
        self.junk_start: int | None = None
        self.known_addresses: set[int] = set()

    @property
    def settled(self) -> int:
        return self.pos if self.junk_start is None else self.junk_start

    def shift(self, n: int) -> None:
        self.pos -= n
        if self.junk_start is not None:
            self.junk_start -= n

    def add_boundary(self, at: int) -> None:
        """Silences do not cut ASCII frames (pauses up to 1 s are allowed between characters)."""

    def scan(self, buf: bytes, end: int, final: bool, out: list[Span]) -> None:
        while self.pos < end:
            if buf[self.pos] != 0x3A:  # ':'
                if self.junk_start is None:
                    self.junk_start = self.pos
                nxt = buf.find(b":", self.pos, end)
                self._junk_to(end if nxt < 0 else nxt, out)
                continue
            stop = min(end, self.pos + MAX_ASCII_CHARS)
            lf = buf.find(b"\n", self.pos, stop)
            colon = buf.find(b":", self.pos + 1, lf if lf >= 0 else stop)
            if colon >= 0:
                self._junk_to(colon, out)
                continue
            if lf < 0:
                if stop < end or final:
                    self._junk_to(stop, out)
                    continue
                return
            wire = bytes(buf[self.pos:lf + 1])
            data = decode_ascii_frame(wire)
            if data is None:
                self._junk_to(lf + 1, out)
                continue
            if self.junk_start is not None:
                out.append(Span(self.junk_start, self.pos, JUNK))
                self.junk_start = None
            out.append(Span(self.pos, lf + 1, ascii_shape(data)))
            self.pos = lf + 1
        if final and self.junk_start is not None:
            out.append(Span(self.junk_start, self.pos, JUNK, True))
            self.junk_start = None

    def _junk_to(self, stop: int, out: list[Span]) -> None:
        if self.junk_start is None:
            self.junk_start = self.pos
        self.pos = stop
        if self.pos - self.junk_start >= MAX_ASCII_CHARS:
            out.append(Span(self.junk_start, self.pos, JUNK))
            self.junk_start = None
