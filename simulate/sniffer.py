"""What the listening adapter's UART receives from a slice of wire frames.

Cheap path: a frame nothing overlaps, with no bit errors, heard by a sniffer at the bus's own
settings arrives exactly as sent, byte k complete at the end of its stop bit. Everything
else (a noisy frame, overlapping talkers, a noise burst, a sniffer at another baud rate or
parity, or with A and B swapped) goes through the bit-level line and the UART receiver of
:mod:`buswitness.simulate.line`, inside windows around the frames concerned.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from buswitness.capture.fileformat import FLAG_LINE_ERROR
from buswitness.serial import SerialFormat
from buswitness.simulate.bus import MASTER, WireSlice
from buswitness.simulate.line import char_bits, invert, low_intervals, merge_intervals, receive


@dataclass
class SliceReception:
    """Frames of a slice in time order, with what the sniffer made of them, and every delivered byte."""

    order: np.ndarray            # slice frame index of each sorted frame
    received: list[bytes]        # per sorted frame: the bytes the sniffer delivered during it
    line_errors: np.ndarray      # per sorted frame: marked bytes delivered during it
    t_arrival_ns: np.ndarray     # every delivered byte, in time order: when complete at the adapter
    value: np.ndarray
    flags: np.ndarray
    stray_bytes: int             # bytes delivered outside any frame (noise on an idle line)
    windowed: np.ndarray         # per sorted frame: went through the bit-level receiver
    idle_byte: np.ndarray | None = None  # per sorted frame: byte the released line left after it, -1 none


def _touching(f_start: np.ndarray, f_end: np.ndarray, wl: np.ndarray, wh: np.ndarray) -> np.ndarray:
    """Frames whose span meets any window."""
    if len(wl) == 0:
        return np.zeros(len(f_start), dtype=bool)
    i = np.searchsorted(wl, f_end, side="left") - 1
    ok = i >= 0
    out = np.zeros(len(f_start), dtype=bool)
    out[ok] = wh[i[ok]] > f_start[ok]
    return out


def receive_slice(ws: WireSlice, bus: SerialFormat, sniffer: SerialFormat, polarity_reversed: bool,
                  bursts: list[tuple[int, int, float]], rng: np.random.Generator,
                  release: tuple[int, int] | None = None) -> SliceReception:
    """Work out the sniffer's bytes for one slice (deterministic for a given generator state).

    ``release`` is ``(after the master, after a station)``: on a line with no fail-safe bias,
    the byte the sniffer's UART reads, with a framing error, when a driver lets go of the
    line at the end of its frame (None: a biased line stays idle).
    """
    n = len(ws)
    starts = np.asarray(ws.f_start, dtype=np.int64)
    in_order = bool((np.diff(starts) >= 0).all())
    order = np.arange(n) if in_order else np.argsort(starts, kind="stable")
    f_start = starts[order]
    f_end = np.asarray(ws.f_end, dtype=np.int64)[order]
    noisy = np.asarray(ws.f_noisy, dtype=bool)[order] if n else np.zeros(0, bool)
    collided = np.asarray(ws.f_collided, dtype=bool)[order] if n else np.zeros(0, bool)
    gap_at = np.asarray(ws.f_gap_at, dtype=np.int64)[order] if n else np.zeros(0, np.int64)
    gap_ns = np.asarray(ws.f_gap_ns, dtype=np.int64)[order] if n else np.zeros(0, np.int64)
    raws = list(ws.f_raw) if in_order else [ws.f_raw[i] for i in order.tolist()]
    lengths = np.fromiter((len(r) for r in raws), dtype=np.int64, count=n)
    values = np.frombuffer(b"".join(raws), dtype=np.uint8)
    offsets = np.cumsum(lengths) - lengths
    fid = np.repeat(np.arange(n), lengths)
    k = np.arange(len(values)) - offsets[fid]
    c = bus.char_time_s * 1e9
    c_start = f_start[fid] + k * c + np.where((gap_at[fid] >= 0) & (k > gap_at[fid]), gap_ns[fid], 0)
    c_end = c_start + c

    full = polarity_reversed or sniffer != bus
    windowed = np.ones(n, dtype=bool) if full else (noisy | collided)
    sb = 1e9 / sniffer.baud
    margin_after = 2 * max(sniffer.char_time_s, bus.char_time_s) * 1e9 + sb
    margin_before = 2 * sb
    burst_lo = [max(a, ws.t_begin_ns) for a, b, _ in bursts if b > ws.t_begin_ns and a < ws.t_end_ns]
    burst_hi = [min(b, ws.t_end_ns) for a, b, _ in bursts if b > ws.t_begin_ns and a < ws.t_end_ns]
    burst_ber = [r for a, b, r in bursts if b > ws.t_begin_ns and a < ws.t_end_ns]
    wl = wh = np.zeros(0)
    for _ in range(8):
        lo = np.concatenate((f_start[windowed] - margin_before, np.asarray(burst_lo, dtype=np.float64)))
        hi = np.concatenate((f_end[windowed] + margin_after, np.asarray(burst_hi, dtype=np.float64) + margin_after))
        wl, wh = merge_intervals(lo, hi)
        more = _touching(f_start, f_end, wl, wh) & ~windowed
        if not more.any():
            break
        windowed |= more

    received: list[bytes] = list(raws)
    line_errors = np.zeros(n, dtype=np.int64)
    cheap_chars = ~windowed[fid]
    arr_parts = [np.round(c_end[cheap_chars]).astype(np.int64)]
    val_parts = [values[cheap_chars]]
    flag_parts = [np.zeros(int(cheap_chars.sum()), dtype=np.uint8)]
    stray = 0
    if len(wl):
        wchars = ~cheap_chars
        bits = char_bits(values[wchars], bus)
        w_fid = fid[wchars]
        nbits = bits.shape[1]
        for f in np.flatnonzero(noisy & windowed).tolist():
            rows = np.flatnonzero(w_fid == f)
            total = len(rows) * nbits
            ber = float(ws.f_ber[int(order[f])])
            count = 1 + int(rng.binomial(max(total - 1, 0), min(ber, 1.0)))
            picks = rng.choice(total, size=min(count, total), replace=False)
            r_idx = rows[picks // nbits]
            b_idx = picks % nbits
            bits[r_idx, b_idx] ^= 1
        ls, le = low_intervals(c_start[wchars], bits, 1e9 / bus.baud)
        g_s, g_e = _glitches(burst_lo, burst_hi, burst_ber, bus, f_start, f_end, rng)
        ls, le = merge_intervals(np.concatenate((ls, g_s)), np.concatenate((le, g_e)))
        if polarity_reversed:
            ls, le = invert(ls, le, float(wl[0]) - 1.0, float(wh[-1]) + 1.0)
        rec = receive(ls, le, list(zip(wl.tolist(), wh.tolist())), sniffer)
        arr_parts.append(np.round(rec.t_end_ns).astype(np.int64))
        val_parts.append(rec.value)
        flag_parts.append(rec.flags)
        # which frame each received character belongs to (both, where two frames overlap)
        w_frames = np.flatnonzero(windowed)
        fs = f_start[w_frames] - 0.5 * sb
        fe = f_end[w_frames].astype(np.float64)
        pos = np.searchsorted(fs, rec.t_start_ns, side="right") - 1
        pairs_f, pairs_c = [], []
        for back in (0, 1, 2):
            p = pos - back
            ok = p >= 0
            ok[ok] = rec.t_start_ns[ok] < fe[p[ok]]
            pairs_f.append(w_frames[p[ok]])
            pairs_c.append(np.flatnonzero(ok))
        pf = np.concatenate(pairs_f)
        pc = np.concatenate(pairs_c)
        stray = int(len(rec.value) - len(np.unique(pc)))
        srt = np.lexsort((pc, pf))
        pf, pc = pf[srt], pc[srt]
        for f in w_frames.tolist():
            received[f] = b""
        if len(pf):
            cut = np.flatnonzero(np.diff(pf)) + 1
            groups_f = pf[np.r_[0, cut]]
            vals_groups = np.split(rec.value[pc], cut)
            flag_groups = np.split(rec.flags[pc], cut)
            for f, vg, fg in zip(groups_f.tolist(), vals_groups, flag_groups):
                received[f] = vg.tobytes()
                line_errors[f] = int(np.count_nonzero(fg))
    idle_byte = np.full(n, -1, dtype=np.int64)
    if release is not None and n:
        talker = np.asarray(ws.f_talker, dtype=np.int64)[order]
        after = _released(f_start, f_end, sniffer)
        idle_byte[after] = np.where(talker[after] == MASTER, release[0], release[1])
        arr_parts.append(f_end[after] + int(round(sniffer.char_time_s * 1e9)))
        val_parts.append(idle_byte[after].astype(np.uint8))
        flag_parts.append(np.full(int(after.sum()), FLAG_LINE_ERROR, dtype=np.uint8))
    t_arr = np.concatenate(arr_parts)
    val = np.concatenate(val_parts)
    flg = np.concatenate(flag_parts)
    srt = np.argsort(t_arr, kind="stable")
    return SliceReception(order=order, received=received, line_errors=line_errors, t_arrival_ns=t_arr[srt],
                          value=val[srt], flags=flg[srt], stray_bytes=stray, windowed=windowed, idle_byte=idle_byte)


def _released(f_start: np.ndarray, f_end: np.ndarray, sniffer: SerialFormat) -> np.ndarray:
    """Frames after whose last stop bit the line is left to float: no other talker still driving it,
    and a whole character of silence before the next frame (else the next driver holds the line)."""
    n = len(f_start)
    if n == 0:
        return np.zeros(0, dtype=bool)
    room = sniffer.char_time_s * 1e9 + 1e9 / sniffer.baud
    driven_before = np.maximum.accumulate(np.r_[np.iinfo(np.int64).min, f_end[:-1]])
    next_start = np.r_[f_start[1:], np.iinfo(np.int64).max]
    return (driven_before <= f_end) & (next_start.astype(np.float64) > f_end + room)


def _glitches(lo: list[int], hi: list[int], ber: list[float], bus: SerialFormat, f_start: np.ndarray,
              f_end: np.ndarray, rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Short low pulses on the idle line during noise bursts (one per bit error the rate implies).

    Pulses that would fall inside a frame (or just before one) are left out: a frame's own damage is decided by the
    bus model, so the truth knows about every damaged frame.
    """
    bit = 1e9 / bus.baud
    guard = bus.char_time_s * 1e9 + bit  # a pulse just before a frame would make the UART misread its start
    starts, ends = [], []
    for a, b, r in zip(lo, hi, ber):
        count = int(rng.poisson(r * bus.baud * (b - a) / 1e9))
        t = np.sort(rng.uniform(a, b, size=count))
        dur = rng.uniform(0.3, 1.5, size=count) * bit
        i = np.searchsorted(f_start, t + dur + guard, side="left") - 1
        inside = np.zeros(count, dtype=bool)
        ok = i >= 0
        inside[ok] = f_end[i[ok]] > t[ok]
        starts.append(t[~inside])
        ends.append(t[~inside] + dur[~inside])
    if not starts:
        return np.zeros(0), np.zeros(0)
    return np.concatenate(starts), np.concatenate(ends)
