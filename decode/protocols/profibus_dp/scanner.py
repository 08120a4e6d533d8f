"""The FDL framer: telegrams from delimiters, lengths, end delimiter and check sum, resumable.

Adapter chunking does not matter: the scanner waits for the bytes a started telegram still
needs. After noise it moves on one byte at a time until a whole valid telegram starts (a
start delimiter, a consistent length, the end delimiter, the FCS), so it resynchronises on
the first good telegram. A lone short acknowledgement (0xE5, nothing to check) is taken only
where a telegram may begin: after a telegram, after a certain silence, at the start.
"""

from __future__ import annotations

from buswitness.decode.messages import Span
from buswitness.decode.protocols.base import JUNK, REQUEST, RESPONSE, NoMarks
from buswitness.decode.protocols.profibus_dp.fdl import (
    FC_REQUEST,
    SC,
    SD2,
    SD4,
    START_DELIMITERS,
    check,
    telegram_length,
)

#: A damage run is handed on once it is this long (memory stays bounded on a noisy line).
MAX_JUNK = 256


def shape_of(buf, p: int) -> int:
    sd = buf[p]
    if sd == SC:
        return RESPONSE
    if sd == SD4:
        return REQUEST
    fc = buf[p + 6] if sd == SD2 else buf[p + 3]
    return REQUEST if fc & FC_REQUEST else RESPONSE


class FdlScanner(NoMarks):
    def __init__(self) -> None:
        self.pos = 0
        self.junk_start: int | None = None
        self.anchored = True
        self.boundaries: list[int] = []
        self.known_addresses: set[int] = set()

    @property
    def settled(self) -> int:
        return self.pos if self.junk_start is None else self.junk_start

    def shift(self, n: int) -> None:
        self.pos -= n
        if self.junk_start is not None:
            self.junk_start -= n
        self.boundaries = [b - n for b in self.boundaries if b - n > 0]

    def add_boundary(self, at: int) -> None:
        """A certain silence lies before ``buf[at]``: no telegram crosses it."""
        if not self.boundaries or at > self.boundaries[-1]:
            self.boundaries.append(at)

    def _crosses(self, a: int, b: int) -> bool:
        return any(a < x < b for x in self.boundaries)

    def _close_junk(self, out: list, at_boundary: bool) -> None:
        if self.junk_start is not None and self.junk_start < self.pos:
            out.append(Span(self.junk_start, self.pos, JUNK, at_boundary))
        self.junk_start = None

    def scan(self, buf, end: int, final: bool, out: list, frames: int | None = None) -> None:
        bset = set(self.boundaries)
        while self.pos < end:
            p = self.pos
            if p in bset:
                self._close_junk(out, True)
                self.anchored = True
            if buf[p] in START_DELIMITERS:
                n = telegram_length(buf, p, end)
                if n < 0 or (n > 0 and p + n > end):
                    if not final:
                        return  # wait for the rest of the telegram
                    n = 0
                if n > 0 and not self._crosses(p, p + n):
                    ok = (self.anchored or p + 1 in bset or (final and p + 1 == end)) if buf[p] == SC \
                        else check(buf, p, n)
                    if ok:
                        self._close_junk(out, False)
                        out.append(Span(p, p + n, shape_of(buf, p)))
                        self.pos = p + n
                        self.anchored = True
                        continue
            if self.junk_start is None:
                self.junk_start = p
            self.pos = p + 1
            self.anchored = False
            if self.pos - self.junk_start >= MAX_JUNK:
                self._close_junk(out, False)
        if final:
            self._close_junk(out, True)


def split_telegrams(data: bytes) -> list[Span]:
    """Every telegram and damage run in ``data`` taken as a whole."""
    sc = FdlScanner()
    out: list[Span] = []
    sc.scan(data, len(data), True, out)
    return out


def explained_fraction(data: bytes) -> float:
    """Share of ``data`` inside valid telegrams (``detect`` scores settings with it)."""
    if not data:
        return 0.0
    return sum(s.end - s.start for s in split_telegrams(data) if s.shape) / len(data)
