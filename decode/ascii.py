"""Modbus ASCII framing: ``:`` hex-pairs LRC CR LF (MSL V1.02 section 2.5.2).

The scanner has the same interface as the RTU :class:`~buswitness.decode.framer.RegionScanner`
so the decoder treats both alike. A frame's ``raw`` is its decoded binary form: address,
PDU and the LRC byte; the frame remembers how many characters it took on the wire. A new
``:`` discards the frame in progress, as the specification says; anything else that forms
no LRC-valid frame is a damage run.
"""

from __future__ import annotations

import numpy as np
from buswitness.decode.framer import JUNK, Span
from buswitness.decode.lengths import (
    _BC8,
    _BC16,
    _RULES,
    EITHER,
    REQUEST,
    RESPONSE,
    candidate_lengths,
    vector_lengths,
)

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

    #: Silences never cut an ASCII frame (the bulk path reads the scanner's certain boundaries).
    boundaries: tuple = ()

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

    def scan(self, buf: bytes, end: int, final: bool, out: list[Span], frames: int | None = None) -> None:
        """Spans of ``buf[pos:end]``; with ``frames``, stop after that many frames (the bulk path goes on)."""
        while self.pos < end:
            if frames is not None and frames <= 0:
                return
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
            if frames is not None:
                frames -= 1
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


# -- the columnar path: runs of back-to-back valid frames, as AsciiScanner.scan finds them ------------
_HEX_VALUE = np.full(256, 255, dtype=np.uint8)
for _i, _ch in enumerate(b"0123456789ABCDEF"):
    _HEX_VALUE[_ch] = _i
    _HEX_VALUE[ord(chr(_ch).lower())] = _i
#: Furthest field (offset + width) any length rule of a function code reads; past a frame's
#: padded end the scalar rule says "not yet", so such frames are shaped one by one.
_FIELD_END = np.zeros(256, dtype=np.int64)
for _fc, _rules in _RULES.items():
    _FIELD_END[_fc] = max(off + (2 if kind == _BC16 else 1) if kind in (_BC8, _BC16) else 0
                          for kind, off, _base in _rules)
_FIELD_END[0x2B] = 1 << 20  # MEI: its own scalar rule


def ascii_shapes(data: np.ndarray, first: np.ndarray, n: np.ndarray) -> np.ndarray:
    """:func:`ascii_shape` of many decoded frames (``data[first[k]:first[k] + n[k]]``), padded as it pads."""
    pad = np.insert(data, first + n, 0)  # each frame followed by its zero pad byte
    pos = first + np.arange(first.size)
    req, rsp = vector_lengths(pad, pos)
    rtu_len = n + 1
    is_req, is_rsp = req == rtu_len, rsp == rtu_len
    shapes = np.where(is_req & ~is_rsp, REQUEST, np.where(is_rsp & ~is_req, RESPONSE, EITHER)).astype(np.int8)
    fcs = data[np.minimum(first + 1, data.size - 1)]
    odd = np.flatnonzero(((fcs & 0x80) == 0) & (_FIELD_END[fcs] >= n + 1) | (n < 2))
    for k in odd.tolist():
        shapes[k] = ascii_shape(data[first[k]:first[k] + n[k]].tobytes())
    return shapes


def _decode_bodies(view: np.ndarray, colons: np.ndarray, n: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The ``n[k]`` bytes in hex after each ``view[colons[k]]``, back to back: where each frame's begin,
    the bytes, and whether every character was a hex digit."""
    first = np.cumsum(n) - n
    hi_at = np.repeat(colons + 1 - 2 * first, n) + 2 * np.arange(int(n.sum()))
    high, low = _HEX_VALUE[view[hi_at]], _HEX_VALUE[view[hi_at + 1]]
    valid = np.maximum.reduceat(high | low, first) < 16 if n.size else np.zeros(0, dtype=bool)
    return first, (high << 4) | (low & 0x0F), valid


class AsciiBulk:
    """Runs of back-to-back LRC-valid frames found in columns; the rest is left to :class:`AsciiScanner`."""

    @staticmethod
    def frames(arr: np.ndarray, pos: int, end: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Starts and wire lengths of the frames from ``pos`` on that the scanner would take one after
        another, each starting where the last ended; their decoded bytes, and where each begins in them."""
        empty = np.zeros(0, np.int64)
        if pos >= end or arr[pos] != 0x3A:
            return empty, empty, np.zeros(0, np.uint8), empty
        view = arr[pos:end]
        colons = np.flatnonzero(view == 0x3A)
        lfs = np.flatnonzero(view == 0x0A)
        if not lfs.size:
            return empty, empty, np.zeros(0, np.uint8), empty
        # frame k: from colon k to the first LF after it, the next frame right behind that LF
        k_lf = np.searchsorted(lfs, colons)
        has_lf = k_lf < lfs.size
        colons, lf = colons[has_lf], lfs[k_lf[has_lf]]
        alone = np.r_[colons[1:] > lf[:-1], True]  # no ':' before its LF (a new ':' discards the frame)
        chained = np.r_[True, colons[1:] == lf[:-1] + 1]
        keep = int(np.argmin(chained)) if not chained.all() else colons.size
        colons, lf, alone = colons[:keep], lf[:keep], alone[:keep]
        n_wire = lf + 1 - colons
        ok = alone & (n_wire >= 9) & (n_wire <= MAX_ASCII_CHARS) & (view[lf - 1] == 0x0D) & (n_wire % 2 == 1)
        first_bad = int(np.argmin(ok)) if not ok.all() else ok.size
        colons, n_wire = colons[:first_bad], n_wire[:first_bad]
        if not colons.size:
            return empty, empty, np.zeros(0, np.uint8), empty
        n = (n_wire - 3) // 2
        first, data, valid = _decode_bodies(view, colons, n)
        # every body character a hex digit, and the byte sum (LRC included) zero
        valid &= (np.add.reduceat(data.astype(np.int64), first) & 0xFF) == 0
        stop = int(np.argmin(valid)) if not valid.all() else valid.size
        if stop < colons.size:
            colons, n_wire, n, first = colons[:stop], n_wire[:stop], n[:stop], first[:stop]
            data = data[:int(n.sum())]
        return pos + colons, n_wire, data, first

    def spans(self, buf: bytes, arr: np.ndarray, pos: int, end: int, expect_response: bool, one_way: int):
        starts, lens, data, first = self.frames(arr, pos, end)
        if not starts.size:
            return starts, lens, np.zeros(0, np.int8), expect_response, np.zeros(0, np.uint8), np.zeros(0, np.uint8)
        n = lens // 2 - 1
        shapes = ascii_shapes(data, first, n)
        return starts, lens, shapes, bool(shapes[-1] != RESPONSE), data[first], data[first + 1]

    @staticmethod
    def frame_bytes(buf: bytes, starts: np.ndarray, lens: np.ndarray) -> list[bytes]:
        """Each frame's decoded bytes (address, PDU, LRC), as ``unwrap`` gives them."""
        n = (lens - 3) // 2
        first, data, _valid = _decode_bodies(np.frombuffer(buf, np.uint8), starts, n)
        whole = data.tobytes()
        return [whole[a:a + k] for a, k in zip(first.tolist(), n.tolist())]

    @staticmethod
    def after_run(sc: AsciiScanner, raws: list, shapes: np.ndarray, addrs: np.ndarray) -> None:
        """Nothing to carry over: the scanner starts each frame afresh at its ':'."""
