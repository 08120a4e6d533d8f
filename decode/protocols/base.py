"""The protocol seam: what the decoder core asks of a field protocol, and nothing more.

A protocol is a module under ``decode/protocols/`` exposing ``PROTOCOL``, an object with the
attributes below, registered by one line in :mod:`buswitness.protocols`. The decoder core
(port streams, the merge of several ports, the facade) calls only these.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Protocol

from buswitness.serial import SerialFormat

#: Scanner verdicts on a frame's direction (shared by every protocol).
JUNK = 0
REQUEST = 1
RESPONSE = 2
EITHER = 3


@dataclass(frozen=True)
class LineTiming:
    """A protocol's intervals on one serial format, in nanoseconds."""

    char_ns: float          # one character on the wire
    gap_in_frame_ns: float  # longer silences inside a frame are reported (Modbus RTU: t1.5)
    frame_gap_ns: float     # a silence this long ends any frame (Modbus RTU: t3.5; Profibus: 33 bit idle)
    cuts_frames: bool = True  # whether such a silence is a frame boundary for the scanner (ASCII: no)


@dataclass(frozen=True)
class DamageText:
    kind: str
    station: int
    detail: str


class Scanner(Protocol):
    """Finds frames in one port's byte buffer, resumable as bytes arrive (see decode/framer.py)."""

    settled: int

    def scan(self, buf: bytes, end: int, final: bool, out: list, frames: int | None = None) -> None: ...
    def add_boundary(self, at: int) -> None: ...
    def shift(self, n: int) -> None: ...


class FieldProtocol(Protocol):
    name: str            # registry name, e.g. "modbus-rtu"
    label: str           # for people, e.g. "Modbus RTU"
    marks_bytes: bool    # the scanner takes UART marks and breaks (add_mark, add_break, breaks, after_frame)
    bulk: Any            # a bulk path (``spans``, ``after_run``, optionally ``walker``) or None
    station_label: str   # what a station is called ("station", "slave")

    def timing(self, fmt: SerialFormat) -> LineTiming: ...
    def new_scanner(self, one_way: int) -> Scanner: ...
    def new_pairing(self, timing: LineTiming, timed: bool) -> Any: ...
    def unwrap(self, wire: bytes) -> tuple[bytes, int]: ...
    def describe_damage(self, raw: bytes, at_boundary: bool) -> DamageText: ...
    def describe_idle(self, raw: bytes, follows: tuple[int, bool], marked: bool) -> DamageText: ...
    def frame_fields(self, raw: bytes) -> tuple[int, int, int]: ...


class NoMarks:
    """Scanner mix-in for protocols whose scanner ignores UART marks and breaks."""

    after_frame = False
    junk_start = None
    breaks: tuple = ()  # positions of break marks not yet judged: never any

    def add_mark(self, at: int) -> None:
        pass

    def add_break(self, at: int) -> None:
        pass


__all__ = ["EITHER", "JUNK", "REQUEST", "RESPONSE", "DamageText", "FieldProtocol", "LineTiming", "NoMarks",
           "Scanner"]
