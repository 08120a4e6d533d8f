"""Find a bus's baud rate and character format from what a receiver makes of its traffic.

At the right setting nearly every byte of Modbus RTU traffic lies in a CRC-valid frame and
nothing is marked bad; at a wrong baud rate almost nothing decodes. Two formats of the same
baud rate are told apart by the UART's marks (an 8E1 receiver on an 8N2 bus takes the first
stop bit for parity and marks about half the bytes; an 8N2 receiver on an 8E1 bus takes the
parity bit for the stop bit and marks a framing error wherever it is 0), and 8N1 from 8N2,
which a receiver reads identically, by the character time seen in the record timestamps:
inside a long frame consecutive reads are one adapter packet apart and a packet holds what
arrived since the previous one (TIMING.md), so interval / bytes = one character time.
"""

from __future__ import annotations

import select
import time
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass

import numpy as np
from buswitness.decode.protocols import get as get_protocol
from buswitness.protocols import DEFAULT as DEFAULT_PROTOCOL
from buswitness.records import FLAG_BREAK, FLAG_LINE_ERROR, Record, RecordBatch
from buswitness.serial import COMMON_BAUD_RATES, SerialFormat

#: Formats tried by default, most common on Modbus RTU first (MSL V1.02 §2.5.1: even parity required,
#: no parity then needs two stop bits).
COMMON_FORMATS = ("8E1", "8N2", "8N1", "8O1")

#: Tie-break preference among formats that read the bytes equally well (same order as above).
_PREFERENCE = {f: i for i, f in enumerate(COMMON_FORMATS)}

#: Relative difference of character times that counts as a disagreement (8N1 vs 8N2 differ by 10%).
TIMING_TOLERANCE = 0.045

#: Fewer busy read pairs than this and the character time is not estimated.
MIN_TIMING_PAIRS = 5

Sample = bytes | bytearray | Iterable[Record] | Iterable[RecordBatch]


@dataclass(frozen=True)
class Observation:
    """What a receiver at one setting delivered, one port's reads merged back into whole reads."""

    data: bytes
    marked: int          #: bytes marked with a parity or framing error
    breaks: int
    t_ns: np.ndarray     #: read-return time of each read that brought data
    lengths: np.ndarray  #: bytes each such read brought

    @classmethod
    def of(cls, sample: Sample) -> Observation:
        """Reduce bytes, records or batches (one port) to an observation."""
        if isinstance(sample, (bytes, bytearray, memoryview)):
            return cls(bytes(sample), 0, 0, np.zeros(0, np.int64), np.zeros(0, np.int64))
        batches: list[RecordBatch] = []
        records: list[Record] = []
        for item in sample:
            if isinstance(item, RecordBatch):
                batches.append(item)
            else:
                records.append(item)
        if records:
            batches.append(RecordBatch.from_records(records))
        if not batches:
            return cls(b"", 0, 0, np.zeros(0, np.int64), np.zeros(0, np.int64))
        t = np.concatenate([b.t_ns for b in batches])
        n = np.concatenate([b.length for b in batches])
        f = np.concatenate([b.flags for b in batches])
        data = b"".join(b.payload.tobytes() for b in batches)
        marked = int(n[(f & FLAG_LINE_ERROR) != 0].sum())
        breaks = int(((f & FLAG_BREAK) != 0).sum())
        # Records of one read share its timestamp (marked bytes are records of their own): merge them.
        has = n > 0
        t, n = t[has], n[has]
        if t.shape[0]:
            first = np.concatenate(([True], np.diff(t) != 0))
            group = np.cumsum(first) - 1
            n = np.bincount(group, weights=n).astype(np.int64)
            t = t[first]
        return cls(data, marked, breaks, t, n)


@dataclass(frozen=True)
class CharTime:
    """Character time estimated from read timestamps inside long frames."""

    seconds: float
    pairs: int  #: read pairs that gave a measurement

    def bits_at(self, baud: int) -> float:
        """Bits per character this estimate implies at ``baud``."""
        return self.seconds * baud


#: A read this long is a full adapter buffer (62 data bytes on the common adapter chips, AN232B-04 in REFERENCES.md §5).
FULL_PACKET = 62


def _split(data: bytes, protocol: str) -> list:
    """Frame and damage spans of ``data`` taken whole, by the protocol's own scanner."""
    proto = get_protocol(protocol)
    split = getattr(proto, "split", None)
    if split is not None:
        return list(split(data))
    out: list = []
    proto.new_scanner(0).scan(data, len(data), True, out)
    return out


def estimate_char_time(data: bytes, t_ns: np.ndarray, lengths: np.ndarray,
                       protocol: str = DEFAULT_PROTOCOL) -> CharTime | None:
    """Character time from reads that fall inside one CRC-valid frame.

    A frame's bytes are back to back. When a read ``b`` lies inside a frame that began
    before the previous read ``a`` returned and goes on after ``b`` (or ``b`` is a full
    adapter buffer), both packets were cut while bytes kept arriving, so the ``n`` bytes of
    ``b`` took the interval between the two reads to arrive, within one character:
    ``c = interval / n`` (TIMING.md). None when fewer than ``MIN_TIMING_PAIRS`` reads qualify.
    """
    t = np.asarray(t_ns, dtype=np.int64)
    n = np.asarray(lengths, dtype=np.int64)
    if t.shape[0] < 3 or int(n.sum()) != len(data):
        return None
    frames = [(sp.start, sp.end) for sp in _split(data, protocol) if sp.shape]
    if not frames:
        return None
    f_start = np.array([a for a, _ in frames], dtype=np.int64)
    f_end = np.array([b for _, b in frames], dtype=np.int64)
    starts = np.cumsum(n) - n
    ratios = []
    for i in range(1, t.shape[0]):
        prev_last = starts[i] - 1
        k = int(np.searchsorted(f_start, prev_last, side="right")) - 1
        if k < 0 or f_end[k] <= prev_last:
            continue
        b_end = starts[i] + n[i]
        inside = f_end[k] > b_end or (f_end[k] >= b_end and n[i] >= FULL_PACKET)
        dt = int(t[i] - t[i - 1])
        if inside and dt > 0:
            ratios.append(dt / 1e9 / int(n[i]))
    if len(ratios) < MIN_TIMING_PAIRS:
        return None
    return CharTime(float(np.median(ratios)), len(ratios))


def _explained(data: bytes, protocol: str = DEFAULT_PROTOCOL) -> float:
    proto = get_protocol(protocol)
    share = getattr(proto, "explained_fraction", None)
    if share is not None:
        return float(share(data))
    return sum(s.end - s.start for s in _split(data, protocol) if s.shape) / len(data) if data else 0.0


@dataclass(frozen=True)
class Score:
    """How well one trial setting reads the traffic; ``value`` is the share of bytes in valid, unmarked frames."""

    setting: SerialFormat
    bytes: int
    explained: float       #: share of bytes in CRC-valid frames
    marked: int            #: bytes marked bad by the UART
    breaks: int
    timing: bool | None    #: the read timestamps agree with this format's character time (None: not measurable)
    char_time_s: float | None

    @property
    def marked_share(self) -> float:
        return self.marked / self.bytes if self.bytes else 0.0

    @property
    def value(self) -> float:
        return self.explained * (1.0 - self.marked_share)

    def evidence(self) -> str:
        """One line a technician can check."""
        if not self.bytes:
            return "no bytes received"
        parts = [f"{100 * self.explained:.1f}% of {self.bytes} bytes in CRC-valid frames",
                 f"{self.marked} marked bad" + (f", {self.breaks} breaks" if self.breaks else "")]
        if self.char_time_s is not None:
            bits = self.char_time_s * self.setting.baud
            verdict = {True: "agrees", False: "disagrees", None: "n/a"}[self.timing]
            parts.append(f"timing {bits:.1f} bits/char ({verdict} with {self.setting.bits_per_char:g})")
        return "; ".join(parts)


def score_observation(setting: SerialFormat, obs: Observation, protocol: str = DEFAULT_PROTOCOL) -> Score:
    """Score what a receiver at ``setting`` delivered (framed as ``protocol``)."""
    ct = estimate_char_time(obs.data, obs.t_ns, obs.lengths, protocol)
    timing: bool | None = None
    if ct is not None:
        timing = abs(ct.seconds - setting.char_time_s) <= TIMING_TOLERANCE * setting.char_time_s
    return Score(setting, len(obs.data), _explained(obs.data, protocol) if obs.data else 0.0, obs.marked, obs.breaks,
                 timing, None if ct is None else ct.seconds)


def _rank_key(s: Score) -> tuple:
    timing_rank = {True: 0, None: 1, False: 2}[s.timing]
    return (-round(s.value * 50) / 50, timing_rank, _PREFERENCE.get(s.setting.short_form, len(_PREFERENCE)),
            -s.value, s.setting.baud)


def rank_settings(sample: Callable[[SerialFormat], Sample], candidates: Iterable[SerialFormat],
                  protocol: str = DEFAULT_PROTOCOL) -> list[Score]:
    """Listen at every candidate setting (``sample`` returns what a receiver set so delivered) and rank them.

    Best first: by the share of bytes in valid, unmarked frames (2% steps), then by whether
    the timestamps agree with the format's character time, then by the usual Modbus order.
    """
    scores = [score_observation(c, Observation.of(sample(c)), protocol) for c in candidates]
    return sorted(scores, key=_rank_key)


def candidates(bauds: Sequence[int] = COMMON_BAUD_RATES, formats: Sequence[str] = COMMON_FORMATS
               ) -> list[SerialFormat]:
    """Every baud rate with every format."""
    return [SerialFormat.parse(f, b) for b in bauds for f in formats]


def verdict(scores: Sequence[Score]) -> str:
    """One sentence on the best guess and how sure it is."""
    if not scores or scores[0].bytes == 0:
        return "no traffic was received at any setting: check the wiring (A/B) and that the bus is active"
    best = scores[0]
    if best.value < 0.5:
        return (f"no setting decodes most of the traffic; the best, {best.setting}, explains only "
                f"{100 * best.value:.0f}% (wrong wiring, polarity reversed, or not Modbus RTU?)")
    text = f"best guess: {best.setting} ({best.evidence()})"
    rivals = [s for s in scores[1:] if round(s.value * 50) == round(best.value * 50)
              and s.setting.baud == best.setting.baud and s.timing == best.timing]
    if rivals:
        names = ", ".join(s.setting.short_form for s in rivals)
        text += (f"; {names} read the bytes the same and the timing could not tell them apart, "
                 f"so the usual Modbus choice was taken")
    return text


# -- listening on a real port ------------------------------------------------------------------
def port_sampler(device: str, seconds: float) -> Callable[[SerialFormat], list[Record]]:
    """A ``sample`` function that reopens ``device`` at each setting and listens for ``seconds``."""
    from buswitness.capture import serialport
    from buswitness.capture.parmrk import ParmrkParser

    def sample(setting: SerialFormat) -> list[Record]:
        port = serialport.open_listening(device, setting)
        parser = ParmrkParser() if port.parmrk else None
        out: list[Record] = []
        try:
            ser = port.serial
            end = time.monotonic() + seconds
            while time.monotonic() < end:
                fd = getattr(ser, "fd", None)
                if fd is not None and not select.select([fd], [], [], min(0.2, max(0.0, end - time.monotonic())))[0]:
                    continue
                data = ser.read(max(1, ser.in_waiting))
                t = time.monotonic_ns()
                if not data:
                    continue
                for d, f in (parser.feed(data) if parser else [(data, 0)]):
                    out.append(Record(0, t, d, f))
        finally:
            port.close()
        return out

    return sample


# -- checking a capture file -----------------------------------------------------------------------
@dataclass(frozen=True)
class FileCheck:
    """Whether a capture's own settings fit its contents."""

    setting: SerialFormat
    score: Score
    implied_bits: float | None  #: bits per character the timestamps imply at the header's baud rate

    @property
    def looks_right(self) -> bool:
        return self.score.value >= 0.5 and self.score.timing is not False

    def describe(self) -> str:
        s = self.score
        lines = [f"the file says {self.setting}: {s.evidence()}"]
        if self.implied_bits is None:
            lines.append("character rate: not measurable (no stretch of continuous traffic spans several reads)")
        else:
            lines.append(f"character rate: the timestamps show {1e3 * (s.char_time_s or 0):.3f} ms a character, "
                         f"{self.implied_bits:.1f} bits at {self.setting.baud} baud (the header's format has "
                         f"{self.setting.bits_per_char:g})")
        lines.append("the file's settings look right" if self.looks_right else
                     "the file's settings do NOT look right: the traffic does not decode well at them"
                     if s.value < 0.5 else
                     "the bytes decode, but the character rate does not match the header's format")
        return "\n".join(lines)


def check_capture(setting: SerialFormat, batches: Iterable[RecordBatch], max_bytes: int = 2 << 20,
                  port: int = 0, protocol: str = DEFAULT_PROTOCOL) -> FileCheck:
    """Check one port of a capture (its first ``max_bytes`` of data) against the settings in its header."""
    taken: list[Record] = []
    total = 0
    for b in batches:
        if not np.any(b.port == port):
            continue
        for r in b.records():
            if r.port == port:
                taken.append(r)
                total += len(r.data)
        if total >= max_bytes:
            break
    score = score_observation(setting, Observation.of(taken), protocol)
    implied = None if score.char_time_s is None else score.char_time_s * setting.baud
    return FileCheck(setting, score, implied)
