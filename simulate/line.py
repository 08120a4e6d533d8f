"""The line as levels over time, and a UART receiver sampling it.

Idle is mark (1). A character is a start bit (0), the data bits LSB first, the parity bit if
any, and the stop bits (1). The line is kept as the sorted, merged intervals where it is low
(space). Where two talkers drive at once a driven 0 wins (the union of their low intervals):
our documented rule for a collision, since a real RS-485 line where drivers disagree has no
defined level and a receiver most often reads the side that pulls hardest.

The receiver hunts for a falling edge, checks the start bit at its middle, samples every
further bit at its middle at the receiver's own baud rate, then checks parity and the first
stop bit. A low stop bit is a framing error; a character that is all low including its stop
bit is a break. After a framing error the receiver waits for the line to go high before
hunting again; after a good character it hunts from the middle of the stop bit.
"""

from __future__ import annotations

import bisect
from dataclasses import dataclass

import numpy as np
from buswitness.capture.fileformat import FLAG_BREAK, FLAG_LINE_ERROR
from buswitness.serial import SerialFormat


def char_bits(values: np.ndarray, fmt: SerialFormat) -> np.ndarray:
    """Levels of each character's bits, one row per character: start, data LSB first, parity, stop(s)."""
    values = np.asarray(values, dtype=np.uint8)
    data = np.unpackbits(values[:, None], axis=1, bitorder="little")[:, :fmt.data_bits]
    cols = [np.zeros((len(values), 1), np.uint8), data]
    if fmt.parity != "N":
        ones = data.sum(axis=1, dtype=np.int64) & 1
        parity = {"E": ones, "O": 1 - ones, "M": np.ones_like(ones), "S": np.zeros_like(ones)}[fmt.parity]
        cols.append(parity.astype(np.uint8)[:, None])
    cols.append(np.ones((len(values), int(np.ceil(fmt.stop_bits))), np.uint8))
    return np.hstack(cols)


def merge_intervals(starts: np.ndarray, ends: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Union of intervals [start, end) as sorted disjoint arrays."""
    if len(starts) == 0:
        return np.zeros(0), np.zeros(0)
    order = np.argsort(starts, kind="stable")
    s = np.asarray(starts, dtype=np.float64)[order]
    e = np.asarray(ends, dtype=np.float64)[order]
    emax = np.maximum.accumulate(e)
    new = np.ones(len(s), dtype=bool)
    new[1:] = s[1:] > emax[:-1]
    first = np.flatnonzero(new)
    last = np.append(first[1:] - 1, len(s) - 1)
    return s[first], emax[last]


def low_intervals(char_start_ns: np.ndarray, bits: np.ndarray, bit_ns: float) -> tuple[np.ndarray, np.ndarray]:
    """Where characters with the given bit levels, starting at the given times, hold the line low."""
    ci, bj = np.nonzero(bits == 0)
    s = char_start_ns[ci] + bj * bit_ns
    return merge_intervals(s, s + bit_ns)


def invert(low_s: np.ndarray, low_e: np.ndarray, lo: float, hi: float) -> tuple[np.ndarray, np.ndarray]:
    """Low intervals of the inverted line (A and B swapped) over [lo, hi)."""
    s = np.concatenate(([lo], low_e))
    e = np.concatenate((low_s, [hi]))
    keep = e > s
    return s[keep], e[keep]


@dataclass
class Received:
    """Characters the receiver delivered: when each was complete, its value, its mark, when it began."""

    t_end_ns: np.ndarray
    value: np.ndarray
    flags: np.ndarray
    t_start_ns: np.ndarray


def receive(low_s: np.ndarray, low_e: np.ndarray, windows: list[tuple[float, float]],
            fmt: SerialFormat) -> Received:
    """Run the UART receiver at ``fmt`` over the line inside each (start, end) window."""
    S = low_s.tolist()
    E = low_e.tolist()
    n = len(S)
    b = 1e9 / fmt.baud
    d = fmt.data_bits
    has_parity = fmt.parity != "N"
    stop_at = 1 + d + (1 if has_parity else 0)
    char_ns = fmt.bits_per_char * b
    right = bisect.bisect_right
    left = bisect.bisect_left

    def is_low(t: float) -> bool:
        i = right(S, t) - 1
        return i >= 0 and t < E[i]

    ends: list[float] = []
    vals: list[int] = []
    marks: list[int] = []
    begins: list[float] = []
    for w_lo, w_hi in windows:
        t = w_lo
        i = right(S, t) - 1
        if i >= 0 and t < E[i]:
            t = E[i]  # line already low: wait for it to go high
        while True:
            i = left(S, t)
            if i >= n:
                break
            s = S[i]
            if s >= w_hi:
                break
            if not is_low(s + 0.5 * b):
                t = s + 0.5 * b  # a glitch shorter than half a bit: not a start bit
                continue
            value = 0
            ones = 0
            for k in range(d):
                if not is_low(s + (k + 1.5) * b):
                    value |= 1 << k
                    ones += 1
            flag = 0
            parity_bit = 0
            if has_parity:
                parity_bit = 0 if is_low(s + (d + 1.5) * b) else 1
                expect = {"E": ones & 1, "O": 1 - (ones & 1), "M": 1, "S": 0}[fmt.parity]
                if parity_bit != expect:
                    flag = FLAG_LINE_ERROR
            t_stop = s + (stop_at + 0.5) * b
            stop_ok = not is_low(t_stop)
            if not stop_ok:
                flag = FLAG_BREAK if (value == 0 and parity_bit == 0) else FLAG_LINE_ERROR
            ends.append(s + char_ns)
            vals.append(0 if flag == FLAG_BREAK else value)
            marks.append(flag)
            begins.append(s)
            if stop_ok:
                t = t_stop
            else:
                j = right(S, t_stop) - 1
                t = E[j]
    return Received(np.asarray(ends, dtype=np.float64), np.asarray(vals, dtype=np.uint8),
                    np.asarray(marks, dtype=np.uint8), np.asarray(begins, dtype=np.float64))
