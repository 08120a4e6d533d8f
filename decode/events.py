"""What the decoder reports, one object at a time: frames, damage and transactions.

These are the object view (for tests and small inputs); the bulk path returns the same
content as DataFrame columns (``docs/tables.md``). Each event checks itself on creation, so
an impossible event cannot reach the analysis.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

#: Damage and notable-traffic kinds (docs/tables.md, "events").
EVENT_KINDS = ("crc_error", "truncated", "gap_in_frame", "turnaround_short", "line_error", "break",
               "stray_bytes", "collision", "bytes_lost", "port_gap", "unexpected_responder",
               "orphan_response", "timing_conflict", "idle_line_byte")

#: Transaction outcomes (docs/tables.md).
OUTCOMES = ("ok", "exception", "timeout", "late", "corrupt", "broadcast", "ambiguous")

DIRECTIONS = ("request", "response", "unknown")


@dataclass(frozen=True)
class Frame:
    """A CRC-valid RTU (or LRC-valid ASCII) frame with its estimated end time and interval."""

    port: int
    raw: bytes
    t_end_lo_ns: int
    t_end_hi_ns: int
    char_ns: float
    direction: str = "unknown"
    wire_chars: int = 0  # characters on the wire when they differ from len(raw) (Modbus ASCII)

    def __post_init__(self) -> None:
        if len(self.raw) < 3:
            raise ValueError(f"a frame has at least 3 bytes, got {len(self.raw)}")
        if self.t_end_lo_ns > self.t_end_hi_ns:
            raise ValueError("frame end interval is reversed")
        if self.direction not in DIRECTIONS:
            raise ValueError(f"direction {self.direction!r} is not one of {DIRECTIONS}")

    @property
    def address(self) -> int:
        return self.raw[0]

    @property
    def function(self) -> int:
        return self.raw[1]

    @property
    def length(self) -> int:
        return len(self.raw)

    @property
    def wire_length(self) -> int:
        """Characters the frame took on the wire."""
        return self.wire_chars or len(self.raw)

    @property
    def t_end_ns(self) -> int:
        """Midpoint of the end-time interval."""
        return (self.t_end_lo_ns + self.t_end_hi_ns) // 2

    @property
    def t_start_ns(self) -> int:
        """Start of the first bit: the bytes of one frame are back to back."""
        return self.t_end_ns - round(self.wire_length * self.char_ns)


@dataclass(frozen=True)
class Damage:
    """Bytes that form no valid frame, or a notable condition on the line."""

    kind: str
    port: int
    t_ns: int
    raw: bytes = b""
    station: int = -1
    detail: str = ""

    def __post_init__(self) -> None:
        if self.kind not in EVENT_KINDS:
            raise ValueError(f"event kind {self.kind!r} is not one of the documented kinds")
        if not -1 <= self.station <= 255:
            raise ValueError(f"station {self.station} is outside 0-255")


@dataclass(frozen=True)
class Transaction:
    """One request on the wire and what became of it."""

    station: int
    function: int
    outcome: str
    t_request_end_ns: int
    request_raw: bytes
    t_response_start_ns: int = -1
    response_raw: bytes = b""
    exception_code: int = 0
    retry: bool = False
    response_ms: float = math.nan
    response_ms_low: float = math.nan
    response_ms_high: float = math.nan

    def __post_init__(self) -> None:
        if self.outcome not in OUTCOMES:
            raise ValueError(f"outcome {self.outcome!r} is not one of {OUTCOMES}")
        if self.outcome == "exception" and not self.exception_code:
            raise ValueError("an exception outcome needs its exception code")
        if not math.isnan(self.response_ms) and not (self.response_ms_low <= self.response_ms
                                                     <= self.response_ms_high):
            raise ValueError("response time lies outside its own interval")
