"""The record batch and its flags: what every floor (capture, decode, simulate) shares.

A record is what one ``read()`` returned: the port, the monotonic time in nanoseconds when
the call returned, flags, and the bytes. A :class:`RecordBatch` holds many records as numpy
columns. This module imports no floor above it.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from dataclasses import dataclass

import numpy as np

# Record flags. A record may carry flags and no bytes (a marker).
FLAG_LINE_ERROR = 0x01   #: the bytes arrived marked bad by the UART (parity or framing error)
FLAG_BREAK = 0x02        #: a break condition (line held low) was received here
FLAG_LOST = 0x04         #: bytes were lost before this record (overrun, queue overflow)
FLAG_REOPENED = 0x08     #: the port was reopened after a disconnect; there is a gap before this record
FLAG_PAUSED = 0x10       #: capture was paused before this record
FLAG_DISCONNECTED = 0x20  #: the port went away at this time
FLAG_UNTIMED = 0x40      #: the timestamp is synthetic (imported raw bytes); only byte order is real

FLAG_NAMES = {
    FLAG_LINE_ERROR: "line-error",
    FLAG_BREAK: "break",
    FLAG_LOST: "bytes-lost",
    FLAG_REOPENED: "reopened",
    FLAG_PAUSED: "paused",
    FLAG_DISCONNECTED: "disconnected",
    FLAG_UNTIMED: "untimed",
}


def flag_names(flags: int) -> list[str]:
    """Human names of the bits set in ``flags``."""
    return [name for bit, name in FLAG_NAMES.items() if flags & bit]


@dataclass(frozen=True)
class Record:
    """One read: which port, when the read returned (monotonic ns), flags, and the bytes."""

    port: int
    t_ns: int
    data: bytes
    flags: int = 0


@dataclass
class RecordBatch:
    """Records as columns: the form the decoder's bulk path consumes."""

    t_ns: np.ndarray      # int64, monotonic ns at read return
    length: np.ndarray    # int64, bytes per record
    port: np.ndarray      # uint8
    flags: np.ndarray     # uint8
    payload: np.ndarray   # uint8, all records' bytes back to back

    def __len__(self) -> int:
        return int(self.t_ns.shape[0])

    @property
    def offsets(self) -> np.ndarray:
        """Start of each record's bytes in ``payload``."""
        ends = np.cumsum(self.length)
        return ends - self.length

    def records(self) -> Iterator[Record]:
        payload = self.payload.tobytes()
        pos = 0
        for t, n, p, f in zip(self.t_ns.tolist(), self.length.tolist(), self.port.tolist(), self.flags.tolist()):
            yield Record(p, t, payload[pos:pos + n], f)
            pos += n

    @classmethod
    def from_records(cls, records: Iterable[Record]) -> RecordBatch:
        recs = list(records)
        return cls(
            t_ns=np.fromiter((r.t_ns for r in recs), dtype=np.int64, count=len(recs)),
            length=np.fromiter((len(r.data) for r in recs), dtype=np.int64, count=len(recs)),
            port=np.fromiter((r.port for r in recs), dtype=np.uint8, count=len(recs)),
            flags=np.fromiter((r.flags for r in recs), dtype=np.uint8, count=len(recs)),
            payload=np.frombuffer(b"".join(r.data for r in recs), dtype=np.uint8).copy(),
        )

    @classmethod
    def concat(cls, batches: list[RecordBatch]) -> RecordBatch:
        """The records of ``batches``, in order, as one batch."""
        if len(batches) == 1:
            return batches[0]
        if not batches:
            return cls.empty()
        return cls(*(np.concatenate([getattr(b, name) for b in batches])
                     for name in ("t_ns", "length", "port", "flags", "payload")))

    @classmethod
    def empty(cls) -> RecordBatch:
        return cls(np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0, np.uint8), np.zeros(0, np.uint8),
                   np.zeros(0, np.uint8))


__all__ = [
    "FLAG_BREAK", "FLAG_DISCONNECTED", "FLAG_LINE_ERROR", "FLAG_LOST", "FLAG_NAMES", "FLAG_PAUSED",
    "FLAG_REOPENED", "FLAG_UNTIMED", "Record", "RecordBatch", "flag_names",
]
