"""Typed messages between the parts of the decoder: port stream -> merge -> pairing.

Small frozen dataclasses instead of tuples, so every hop names what it carries. None of
them knows a protocol's bytes: ``shape`` is the scanner's verdict (request, response,
either: :mod:`buswitness.decode.protocols.base`), ``address`` and ``function`` whatever the
protocol calls the station and the service of a frame.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from buswitness.decode.events import Damage


@dataclass(frozen=True)
class Span:
    """A piece of the stream: a frame (``shape`` > 0, see lengths) or damaged bytes (``shape`` 0)."""

    start: int
    end: int
    shape: int
    at_boundary: bool = False  # damaged run that ends at a certain silence (or the end of input)
    crosses: bool = False  # frame with a certain silence inside it
    #: An idle-line byte (shape ``JUNK``): the address of the frame it follows and whether that
    #: frame was taken as a request (the master let go of the line) or as an answer.
    follows: tuple[int, bool] | None = None

    @property
    def kind(self) -> str:
        """``frame``, ``idle`` (a byte a driver left behind its frame) or ``damage``."""
        return "frame" if self.shape else "idle" if self.follows is not None else "damage"


@dataclass(frozen=True)
class FrameMsg:
    """A frame the port stream settled, on its way to pairing (sorted by time among ports)."""

    port: int
    raw: bytes
    t_end_lo_ns: int
    t_end_hi_ns: int
    shape: int
    gap_ns: float = 0.0  # the longest silence inside the frame over the protocol's in-frame limit
    wire_chars: int = 0  # characters on the wire when they differ from len(raw)


@dataclass(frozen=True)
class DamageMsg:
    """Damage the port stream found (stray bytes, marks, gaps), on its way to pairing."""

    damage: Damage


@dataclass(frozen=True)
class BulkRun:
    """Frames the bulk path found, as columns (one entry per frame, in stream order)."""

    lo: np.ndarray       # int64 end-time interval, low
    hi: np.ndarray       # int64 end-time interval, high
    lens: np.ndarray     # int64 frame lengths in bytes
    shapes: np.ndarray   # int8 scanner verdicts
    addrs: np.ndarray    # uint8 station address
    fcs: np.ndarray      # uint8 function code
    raws: Sequence       # bytes of each frame: a list, or decode/rawbytes.py RawSlices (read lazily)

    def __len__(self) -> int:
        return int(self.lens.shape[0])


@dataclass(frozen=True)
class RegularRun:
    """A run of request/answer pairs, frames ``i`` to ``j`` of a :class:`BulkRun`, with their times."""

    port: int
    run: BulkRun
    t_start: np.ndarray
    t_end: np.ndarray
    char_ns: float
    i: int
    j: int
    #: The requests' port when it is not ``port`` (a four-wire bus: ``port`` hears the answers).
    request_port: int = -1


__all__ = ["BulkRun", "DamageMsg", "FrameMsg", "RegularRun", "Span"]
