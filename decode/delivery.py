"""What a capture does not say about its adapter, read from the records themselves (TIMING.md).

A USB serial adapter sends a packet when its latency timer ``L`` expires or its buffer
(``P`` = 62 data bytes) fills; the timer restarts after every packet and expires even when
idle, so the packets of a timer sit on a grid of period ``L`` that only a full-buffer packet
re-phases. The read returns a small host delay ``d`` later. Hence the time from any record
to the next record that is *not* a full buffer is a whole number of periods plus the
difference of two host delays — whatever happened in between. Two facts follow:

* the lattice: such gaps sit on multiples of ``L`` (any divisor of ``L`` fits too);
* the floor: no such gap is much shorter than ``L``.

:func:`estimate_delivery` takes the largest whole-millisecond timer the floor allows whose
lattice the gaps follow about as well as any. A smaller estimate than the truth would make
every interval too narrow, so when the evidence is thin or contradictory it keeps the
conservative default (16 ms), or the shortest gaps when those are longer, and says so.

:func:`measure_pitch` measures the character time ``c`` where the grid is fine enough:
within one frame the bytes are back to back, so over many whole frames the time their
records span counts their characters; back-to-back full-buffer packets are ``P·c`` apart. A bus with two stop bits read under an 8N1 setting
shows 11 bits per character where the setting says 10 (MSL §2.5.1 p12: an RTU character
is 11 bits; without parity two stop bits keep it 11).

Pure functions of numpy columns: no files, no clocks.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from buswitness.decode.timing import SerialFormat, t35_s

#: The latency timer's range on the common adapter parts, whole milliseconds (TIMING.md).
TIMER_RANGE_MS = (1, 255)
#: What is assumed when the records cannot tell (the usual factory setting, TIMING.md).
FALLBACK_LATENCY_MS = 16.0
#: Full-buffer packet size of the common parts (TIMING.md: 62 data bytes).
PACKET_BYTES = 62
#: Fewest usable gaps before the grid is believed.
MIN_GAPS = 50
#: Share of gaps that must sit within tolerance of a multiple of the period ...
MIN_ON_GRID = 0.7
#: ... and by this much more than gaps spread at random would.
MIN_LIFT = 0.3
#: A period fits about as well as the best when its share is within this of the best's.
FIT_MARGIN = 0.03
#: The shortest gaps: the 1st percentile (below it, a long host delay before a short one), and
#: their cluster, up to this many times that percentile (plus the tolerance).
SHORT_GAP_SHARE = 0.01
SHORT_CLUSTER = 1.25
#: The grid tolerance widens to this many standard deviations of the host's jitter.
JITTER_SIGMAS = 2.0
#: Host-delay jitter tolerated around a grid point (ms), and its share of a short period.
GRID_TOL_MS = 0.5
GRID_TOL_SHARE = 0.25
#: Gaps longer than this say nothing about the timer (idle periods, clock drift), ms.
MAX_GAP_MS = 2000.0
#: Stamp steps looked for (10 ms down to 1 µs), and the share of read times that must sit on one.
STAMP_STEPS_NS = (10_000_000, 1_000_000, 100_000, 10_000, 1_000)
STAMP_STEP_SHARE = 0.999
#: The pitch is measured only from read times stamped at least this finely (a share of the period).
STAMP_STEP_PITCH = 0.05
#: A period is judged only where gaps spread at random would land on its grid at most this often.
MAX_CHANCE = 0.6
#: Fewest runs (or full-buffer pairs) before a character pitch is reported.
MIN_PITCH_SAMPLES = 30
#: Two full-buffer packets further apart than this many times P stated characters had a silence between.
FULL_PAIR_SLACK = 1.3
#: Measured and stated character times differ when they are this far apart (relative) ...
PITCH_REL_TOL = 0.03
#: ... and beyond this many standard errors of the measurement.
PITCH_SIGMAS = 4.0


@dataclass(frozen=True)
class DeliveryEstimate:
    """The adapter's delivery grid as read from one port's record times."""

    latency_ms: float
    host_delay_ms: float | None  #: spread (robust standard deviation) of the host delay, None if not seen
    packet_bytes: int
    source: str                  #: "estimated", or "default" when the records could not tell
    method: str                  #: how it was found, in words a technician can check
    confidence: str              #: "high", "medium" or "low"
    on_grid: float               #: share of the usable gaps on the grid (0 when no grid was found)
    gaps: int                    #: usable gaps examined

    def to_dict(self) -> dict:
        return {"latency_ms": self.latency_ms, "host_delay_ms": self.host_delay_ms,
                "packet_bytes": self.packet_bytes, "source": self.source, "method": self.method,
                "confidence": self.confidence, "on_grid": round(self.on_grid, 4), "gaps": self.gaps}


@dataclass(frozen=True)
class PitchMeasure:
    """The measured time between the ends of consecutive characters of one talker."""

    char_ms: float
    spread_ms: float   #: standard error of ``char_ms``
    samples: int       #: runs of busy ticks and back-to-back full-buffer pairs used
    method: str

    def bits_at(self, baud: int) -> float:
        """The measured pitch in bit times at ``baud``."""
        return self.char_ms * 1e-3 * baud

    def to_dict(self) -> dict:
        return {"char_ms": round(self.char_ms, 5), "spread_ms": round(self.spread_ms, 5),
                "samples": self.samples, "method": self.method}


def _gaps_ms(t_ns: np.ndarray, n: np.ndarray, packet_bytes: int) -> np.ndarray:
    """Gaps before every record that is not a full buffer (full ones leave off the grid), in ms."""
    t = np.asarray(t_ns, dtype=np.int64)
    k = np.asarray(n, dtype=np.int64)
    if t.shape[0] < 2:
        return np.zeros(0)
    g = np.diff(t).astype(np.float64) / 1e6
    keep = (k[1:] < packet_bytes) & (g > 0) & (g <= MAX_GAP_MS)
    return g[keep]


def timestamp_step_ms(t_ns: np.ndarray) -> float:
    """The resolution the read times were written with: 1.0 for a log with millisecond stamps, 0 when fine."""
    t = np.asarray(t_ns, dtype=np.int64)
    if t.shape[0] < 2:
        return 0.0
    d = t - t[0]
    for step_ns in STAMP_STEPS_NS:
        if np.mean(d % step_ns == 0) >= STAMP_STEP_SHARE:
            return step_ns / 1e6
    return 0.0


def _tolerance(period_ms: float, step_ms: float = 0.0) -> float:
    """How far from a grid point a read may fall: the host's jitter, or the stamps' own step if coarser."""
    return max(min(GRID_TOL_MS, GRID_TOL_SHARE * period_ms), step_ms)


def _on_grid(gaps: np.ndarray, period_ms: float, step_ms: float = 0.0) -> float:
    r = gaps - period_ms * np.rint(gaps / period_ms)
    return float(np.mean(np.abs(r) <= _tolerance(period_ms, step_ms)))


def _fallback(reason: str, gaps: int, packet_bytes: int, floor_ms: float = 0.0) -> DeliveryEstimate:
    latency = max(FALLBACK_LATENCY_MS, float(np.ceil(floor_ms)))
    if latency > FALLBACK_LATENCY_MS:
        reason += f" (the records allow a timer up to {latency:g} ms)"
    return DeliveryEstimate(latency, None, packet_bytes, "default",
                            f"{reason}; assuming the conservative {latency:g} ms", "low", 0.0, gaps)


def estimate_delivery(t_ns: np.ndarray, n: np.ndarray, char_s: float,
                      packet_bytes: int = PACKET_BYTES) -> DeliveryEstimate:
    """Estimate the adapter's latency timer from one port's record times and sizes.

    ``char_s`` is the stated character time, used only for the floor the chunk sizes set (a
    chunk that is not a full buffer arrived within one period). Never smaller than the
    truth on a grid-forming adapter; where the records show no grid, the conservative
    default, or the shortest gaps between reads when those are longer.
    """
    t = np.asarray(t_ns, dtype=np.int64)
    k = np.asarray(n, dtype=np.int64)
    gaps = _gaps_ms(t, k, packet_bytes)
    # Chunk sizes: n back-to-back bytes that came in one timer packet span (n-1)·c, which one
    # period holds. The 99th percentile ignores reads that took two packets (a late host);
    # 0.9·c allows the stated format to be 10 % off.
    partial = k[(k > 0) & (k < packet_bytes)]
    floor_ms = float((np.percentile(partial, 99) - 1) * 0.9 * char_s * 1e3) if partial.size else 0.0
    if gaps.size < MIN_GAPS:
        return _fallback(f"only {gaps.size} gaps between records, too few to see the adapter's grid",
                         int(gaps.size), packet_bytes, floor_ms)
    # The shortest gaps are one period plus the difference of two host delays: their cluster's
    # middle is the longest period the records allow, its spread the host's jitter.
    short = float(np.quantile(gaps, SHORT_GAP_SHARE))
    cluster = gaps[gaps <= SHORT_CLUSTER * short + GRID_TOL_MS]
    jitter = 1.4826 * float(np.median(np.abs(cluster - np.median(cluster))))
    # Read times written with a coarse step (a log with millisecond stamps) blur the grid by that
    # step, a busy host by its jitter; a period too short to tell from that blur is not judged.
    step = timestamp_step_ms(t)
    blur = max(step, JITTER_SIGMAS * jitter)
    longest = float(np.median(cluster)) + max(GRID_TOL_MS, blur)
    lo_t, hi_t = TIMER_RANGE_MS
    fits: list[tuple[int, float]] = []
    for candidate in range(min(hi_t, int(np.floor(longest))), lo_t - 1, -1):
        chance = 2 * _tolerance(candidate, blur) / candidate
        if chance > MAX_CHANCE:
            break
        on = _on_grid(gaps, candidate, blur)
        if on >= MIN_ON_GRID and on - chance >= MIN_LIFT:
            fits.append((candidate, on))
    if not fits:
        why = ""
        if blur > GRID_TOL_MS:
            why = (f"; read times are stamped to {step:g} ms" if step >= blur else
                   f"; the host's delay varies by about {jitter:.2f} ms")
        return _fallback(f"the {gaps.size:,} gaps between records sit on no timer grid of 1 to 255 ms that "
                         f"they can show (the shortest are {np.median(cluster):.2f} ms{why})", int(gaps.size),
                         packet_bytes, max(floor_ms, longest))
    # Every divisor of the period fits its grid as well: the largest that fits about as well as any.
    top = max(on for _, on in fits)
    candidate, share = next((c, on) for c, on in fits if on >= top - FIT_MARGIN)
    period = float(candidate)
    if period < floor_ms:
        return _fallback(f"the records sit on a {period:g} ms grid but chunks of their size need at least "
                         f"{floor_ms:.1f} ms", int(gaps.size), packet_bytes, max(floor_ms, longest))
    r = gaps - period * np.rint(gaps / period)
    near = r[np.abs(r) <= _tolerance(period, blur)]
    # r is the difference of two host delays: its robust spread over √2 is the delay's spread.
    mad = float(np.median(np.abs(near - np.median(near)))) if near.size else 0.0
    spread = 1.4826 * mad / np.sqrt(2.0)
    confidence = "high" if share >= 0.9 and gaps.size >= 1000 else "medium"
    method = (f"records fall on a {period:.2f} ms grid in {100 * share:.0f} % of {gaps.size:,} gaps; "
              f"the shortest gaps are {np.median(cluster):.2f} ms, so the timer is not longer; "
              f"host delay spread about {spread:.2f} ms")
    return DeliveryEstimate(period, round(float(spread), 4), packet_bytes, "estimated", method, confidence, share,
                            int(gaps.size))


def measure_pitch(t_ns: np.ndarray, n: np.ndarray, latency_ms: float, stated: SerialFormat,
                  packet_bytes: int = PACKET_BYTES) -> PitchMeasure | None:
    """The character pitch the records show, or None where they cannot show it.

    Two kinds of evidence, each estimated on its own and combined by their standard errors:

    * whole frames on a fine grid: a run of records one period apart (every tick brought
      bytes), with an empty tick before and after it, is one frame of ``N`` bytes. Its byte
      ends span ``(N - 1)·c``; the ticks it touches number ``span / L + 1`` on average over
      the grid's phase, so the sum of the runs' first-to-last record times over the sum of
      their ``N - 1`` estimates ``c`` without bias — even for frames that fit in one tick.
      Used only where an inter-frame silence (t3.5) surely leaves an empty tick
      (``t3.5 + c ≥ 2L``), so a run never bridges two frames;
    * consecutive full-buffer records less than a period apart and not much further apart
      than ``P`` stated characters: ``P`` bytes over their gap (the median: a pair that spans
      the silence between two frames is slower).
    """
    t = np.asarray(t_ns, dtype=np.int64)
    k = np.asarray(n, dtype=np.int64)
    if t.shape[0] < 3:
        return None
    if timestamp_step_ms(t) > STAMP_STEP_PITCH * latency_ms:
        return None  # stamps too coarse to count characters between grid points
    tm = (t - t[0]).astype(np.float64) / 1e6
    gap = np.diff(tm)
    tol = _tolerance(latency_ms)
    times: list[np.ndarray] = []
    chars: list[np.ndarray] = []
    used_runs = used_full = 0
    c_ms = stated.char_time_s * 1e3
    if t35_s(stated) * 1e3 + c_ms >= 2 * latency_ms:
        # gap j links records j and j+1
        one_tick = (np.abs(gap - latency_ms) <= tol) & (k[1:] < packet_bytes) & (k[:-1] < packet_bytes)
        empty_tick = gap >= 2 * latency_ms - tol
        # a run of one-tick gaps s..e-1 links records s..e; a record alone is a run with s == e
        d = np.diff(np.r_[0, one_tick.astype(np.int8), 0])
        run_s, run_e = np.flatnonzero(d == 1), np.flatnonzero(d == -1)
        lone = np.flatnonzero(~np.r_[False, one_tick] & ~np.r_[one_tick, False])
        s = np.r_[run_s, lone]
        e = np.r_[run_e, lone]
        # an empty tick on both sides: the run is one whole frame (or a whole answer, a whole request)
        before = np.r_[False, empty_tick][s] & (s > 0)
        after = np.r_[empty_tick, False][e] & (e < t.shape[0] - 1)
        whole = before & after & (k[s] < packet_bytes) & (k[e] < packet_bytes)
        s, e = s[whole], e[whole]
        cum = np.r_[0, np.cumsum(k)]
        nbytes = cum[e + 1] - cum[s]
        ok = nbytes >= 2
        times.append(tm[e[ok]] - tm[s[ok]])
        chars.append((nbytes[ok] - 1).astype(np.float64))
        used_runs = int(ok.sum())
    # back to back only when nothing but characters lay between them: up to 30 % slower than stated
    full = ((k[1:] == packet_bytes) & (k[:-1] == packet_bytes) & (gap > 0) & (gap < latency_ms)
            & (gap <= FULL_PAIR_SLACK * packet_bytes * c_ms))
    used_full = int(full.sum())
    found: list[tuple[float, float]] = []  # (pitch, its standard error)
    if used_runs >= MIN_PITCH_SAMPLES:
        y = np.concatenate(times)
        x = np.concatenate(chars)
        ratio = float(y.sum() / x.sum())
        found.append((ratio, max(float(np.sqrt(np.sum((y - ratio * x) ** 2)) / x.sum()), 1e-9)))
    else:
        used_runs = 0
    if used_full >= MIN_PITCH_SAMPLES:
        per = gap[full] / packet_bytes
        mid = float(np.median(per))
        robust = 1.4826 * float(np.median(np.abs(per - mid)))
        found.append((mid, max(1.2533 * robust / np.sqrt(per.size), 1e-9)))
    else:
        used_full = 0
    if not found:
        return None
    w = np.array([1.0 / se ** 2 for _, se in found])
    char_ms = float(np.sum(w * np.array([v for v, _ in found])) / w.sum())
    spread = float(1.0 / np.sqrt(w.sum()))
    parts = []
    if used_runs:
        parts.append(f"{used_runs:,} whole frames on the {latency_ms:g} ms grid")
    if used_full:
        parts.append(f"{used_full:,} back-to-back full-buffer pairs")
    method = f"time per character over {' and '.join(parts)}"
    return PitchMeasure(char_ms, spread, used_runs + used_full, method)


def pitch_disagrees(measure: PitchMeasure, stated_char_s: float) -> bool:
    """True when the measured pitch is off the stated character time beyond its spread."""
    stated_ms = stated_char_s * 1e3
    diff = abs(measure.char_ms - stated_ms)
    return diff > PITCH_REL_TOL * stated_ms and diff > PITCH_SIGMAS * measure.spread_ms


def format_for_pitch(measure: PitchMeasure, stated: SerialFormat) -> SerialFormat | None:
    """The character format at the stated baud rate whose character time the pitch matches.

    Keeps the data bits and, where it fits, the parity; changes the stop bits first. None when
    no format at this baud gives the measured pitch (the baud rate itself may be wrong, or the
    devices leave gaps between characters).
    """
    bits = measure.bits_at(stated.baud)
    options = []
    for data in (stated.data_bits, 8, 7):
        for parity in (stated.parity, "N", "E"):
            for stop in (stated.stop_bits, 1, 2, 1.5):
                fmt = SerialFormat(stated.baud, data, parity, stop)
                options.append(fmt)
    best = min(options, key=lambda f: abs(f.bits_per_char - bits))
    if abs(best.bits_per_char - bits) > PITCH_REL_TOL * bits:
        return None
    return best


def merge_same_time(t_ns: np.ndarray, n: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """One record per read time: a read split into several records (a marked byte is a record of
    its own with its chunk's time) counts as the one chunk it was."""
    t = np.asarray(t_ns, dtype=np.int64)
    k = np.asarray(n, dtype=np.int64)
    if t.shape[0] == 0:
        return t, k
    new = np.r_[True, np.diff(t) != 0]
    idx = np.flatnonzero(new)
    return t[idx], np.add.reduceat(k, idx)


@dataclass(frozen=True)
class PortDelivery:
    """What one port's records say about its adapter and its line, and what the timing model uses."""

    port: int
    latency_ms: float                  #: used by the timing model
    latency_source: str                #: the header's source, or "estimated"
    estimate: DeliveryEstimate | None  #: None when the header stated the latency
    pitch: PitchMeasure | None
    stated: SerialFormat
    measured_format: SerialFormat | None = None  #: used instead of ``stated`` (the pitch disagrees)

    @property
    def pitch_differs(self) -> bool:
        return self.pitch is not None and pitch_disagrees(self.pitch, self.stated.char_time_s)

    def notice(self) -> str | None:
        """A sentence naming the measured character time where it disagrees with the stated format."""
        if not self.pitch_differs or self.pitch is None:
            return None
        stated_ms = self.stated.char_time_s * 1e3
        bits = self.pitch.bits_at(self.stated.baud)
        said = (f"the file says {self.stated.short_form} ({stated_ms:.3f} ms, "
                f"{self.stated.bits_per_char:g} bits at {self.stated.baud} baud)")
        if self.measured_format is not None:
            return (f"characters are {self.pitch.char_ms:.3f} ms apart ({bits:.1f} bits at {self.stated.baud} baud, "
                    f"as {self.measured_format.short_form}), {said}: response times use the measured pitch")
        return (f"characters are {self.pitch.char_ms:.3f} ms apart ({bits:.1f} bits at {self.stated.baud} baud), "
                f"{said}; no character format at this baud rate fits, so the stated one is kept: check the baud "
                f"rate, or devices that pause between characters")

    def to_dict(self) -> dict:
        return {"port": self.port, "latency_ms": self.latency_ms, "latency_source": self.latency_source,
                "estimate": None if self.estimate is None else self.estimate.to_dict(),
                "pitch": None if self.pitch is None else self.pitch.to_dict(),
                "stated_char_ms": round(self.stated.char_time_s * 1e3, 5),
                "measured_format": None if self.measured_format is None else self.measured_format.short_form,
                "notice": self.notice()}


def assess_port(port: int, t_ns: np.ndarray, n: np.ndarray, stated: SerialFormat,
                latency_ms: float | None, latency_source: str = "unknown",
                packet_bytes: int = PACKET_BYTES, measure_pitch_too: bool = True) -> PortDelivery:
    """Estimate the latency when ``latency_ms`` is None, measure the pitch, and choose what the model uses.

    ``t_ns``/``n`` are one port's records with bytes, in time order (a bounded sample is enough).
    ``measure_pitch_too`` False skips the pitch (a protocol whose traffic does not fit its model).
    """
    t, k = merge_same_time(t_ns, n)
    estimate = None
    latency = latency_ms
    source = latency_source
    if latency is None:
        estimate = estimate_delivery(t, k, stated.char_time_s, packet_bytes)
        latency = estimate.latency_ms
        if estimate.source == "estimated" or latency > FALLBACK_LATENCY_MS:
            source = "estimated"
    pitch = measure_pitch(t, k, latency, stated, packet_bytes) if measure_pitch_too else None
    measured = None
    if pitch is not None and pitch_disagrees(pitch, stated.char_time_s):
        measured = format_for_pitch(pitch, stated)
    return PortDelivery(port, float(latency), source, estimate, pitch, stated, measured)


__all__ = [
    "FALLBACK_LATENCY_MS",
    "DeliveryEstimate",
    "PitchMeasure",
    "PortDelivery",
    "assess_port",
    "estimate_delivery",
    "format_for_pitch",
    "measure_pitch",
    "merge_same_time",
    "pitch_disagrees",
    "timestamp_step_ms",
]
