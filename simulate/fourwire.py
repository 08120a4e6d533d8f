"""A simulated capture as a four-wire bus would give it: one adapter on the master's pair, one on the stations'.

A four-wire (full-duplex wiring, half-duplex protocol) Modbus bus carries the master's frames
on one pair and the stations' answers on the other; a recording with one adapter per pair
(``record --roles master,slaves``) holds two ports. The simulator models one two-wire line,
so this module re-reads its truth: each frame as the line carried it (``received``, with any
damage) goes to port 0 when the master sent it and to port 1 otherwise, its bytes evenly
spread over the frame's time on the wire, and each port's adapter returns what arrived in
each of its ``latency_ms`` periods (each port with its own phase) a fixed host delay later.

Bytes the line carried outside any frame (noise between frames) are not on either port.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np
from buswitness.capture.fileformat import CaptureHeader, PortInfo, RecordBatch
from buswitness.simulate.run import SimResult

ROLES = {0: "master", 1: "slaves"}
HOST_DELAY_NS = 200_000
#: Where in its period each port's adapter timer starts (a share of the period): the two
#: adapters are not in step.
PHASES = (0.3, 0.7)


def four_wire_header(result: SimResult, latency_ms: float) -> CaptureHeader:
    """The header of the two-port capture: the simulated line's settings, the port roles in ``extra``."""
    h = result.header
    ports = [PortInfo(0, "master pair", latency_ms=latency_ms, latency_source="simulated"),
             PortInfo(1, "stations pair", latency_ms=latency_ms, latency_source="simulated")]
    return CaptureHeader(serial=h.serial, ports=ports, start_utc=h.start_utc, start_monotonic_ns=h.start_monotonic_ns,
                         host=h.host, notes=h.notes + " (four-wire, one adapter per pair)", source=h.source,
                         timing="host", capture_id=h.capture_id + "-4w",
                         extra={"port_roles": {str(k): v for k, v in ROLES.items()}})


def four_wire_batches(result: SimResult, latency_ms: float = 16.0,
                      batch_records: int = 16384) -> Iterator[RecordBatch]:
    """The simulation's frames as the records of a two-port (master pair, stations pair) capture."""
    frames = result.truth.frames
    received = [r if isinstance(r, (bytes, bytearray)) else b"" for r in frames["received"].tolist()]
    n = np.fromiter((len(r) for r in received), dtype=np.int64, count=len(received))
    keep = n > 0
    if not keep.any():
        return
    first = frames["t_first_bit_ns"].to_numpy(np.int64)[keep]
    last = frames["t_last_bit_ns"].to_numpy(np.int64)[keep]
    port_of_frame = (frames["talker"].astype(str).to_numpy() != "master")[keep].astype(np.uint8)
    n = n[keep]
    payload = np.frombuffer(b"".join(r for r, k in zip(received, keep.tolist()) if k), dtype=np.uint8)
    # byte k of a frame of n bytes ends (k + 1) / n of the way from its first bit to its last
    frame_of_byte = np.repeat(np.arange(n.size), n)
    k = np.arange(payload.size) - np.repeat(np.cumsum(n) - n, n) + 1
    t_byte = first[frame_of_byte] + (last - first)[frame_of_byte] * k // n[frame_of_byte]
    port = port_of_frame[frame_of_byte]
    period = int(latency_ms * 1e6)
    phase = np.asarray([int(p * period) for p in PHASES], dtype=np.int64)[port]
    # the read that returns a byte: the end of the adapter period it arrived in, plus the host's delay
    t_read = -((phase - t_byte) // period) * period + phase + HOST_DELAY_NS
    order = np.lexsort((t_byte, port, t_read))
    t_read, port, payload = t_read[order], port[order], payload[order]
    starts = np.flatnonzero(np.r_[True, (t_read[1:] != t_read[:-1]) | (port[1:] != port[:-1])])
    lengths = np.diff(np.r_[starts, t_read.size])
    for a in range(0, starts.size, batch_records):
        b = min(a + batch_records, starts.size)
        lo, hi = int(starts[a]), int(starts[b]) if b < starts.size else t_read.size
        yield RecordBatch(t_read[starts[a:b]].copy(), lengths[a:b].astype(np.int64), port[starts[a:b]].copy(),
                          np.zeros(b - a, np.uint8), payload[lo:hi].copy())


__all__ = ["ROLES", "four_wire_batches", "four_wire_header"]
