"""A small model of the wire and a USB adapter, shared by the decoder tests.

Bytes of a frame go back to back at the character time; the adapter hands them over in
packets when its latency timer expires or its 62-byte buffer fills (TIMING.md), and the
read returns a fixed host delay later.
Outside check values carry their source inline (source: the MAP/MSL specifications,
TIMING.md or termios(3), as cited beside each).
"""

from __future__ import annotations

import math

from buswitness.decode import Decoder, DecoderConfig, SerialFormat

FMT_19200 = SerialFormat(19200, 8, "E", 1)


def deliver(frames: list[tuple[float, bytes]], char_ns: float, latency_ns: float, host_delay_ns: float = 200_000,
            packet: int = 62, phase_ns: float = 0.0) -> list[tuple[int, bytes]]:
    """Records ``(t_ns, bytes)`` an adapter would produce for ``frames`` (start time, bytes) on the wire."""
    ends: list[tuple[float, int]] = []
    for t0, raw in frames:
        ends.extend((t0 + (k + 1) * char_ns, b) for k, b in enumerate(raw))
    ends.sort()
    records: list[tuple[int, bytes]] = []
    pending: list[int] = []
    tick = phase_ns + latency_ns
    for t, b in ends:
        if t > tick:
            if pending:
                records.append((int(tick + host_delay_ns), bytes(pending)))
                pending = []
                tick += latency_ns
            if t > tick:
                tick += math.ceil((t - tick) / latency_ns) * latency_ns
        pending.append(b)
        if len(pending) == packet:
            records.append((int(t + host_delay_ns), bytes(pending)))
            pending = []
            tick = t + latency_ns
    if pending:
        records.append((int(tick + host_delay_ns), bytes(pending)))
    return records


def decode_records(records: list[tuple[int, bytes]], config: DecoderConfig | None = None, port: int = 0) -> list:
    """Feed records one by one and flush; all objects in order."""
    dec = Decoder(config or DecoderConfig(serial=FMT_19200))
    out: list = []
    for t, data in records:
        out.extend(dec.feed(port, t, data))
    out.extend(dec.flush_events())
    return out


def of_type(items: list, cls: type) -> list:
    return [x for x in items if isinstance(x, cls)]
