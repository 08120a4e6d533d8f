"""When did each byte arrive? Bounds on byte end times from read-return times (TIMING.md).

A record's bytes came in USB packets the adapter sent when its latency timer ``L`` expired
or its buffer (``P`` data bytes) filled; the read returned at ``T``, at most the host delay
``d`` after the packet. So every byte of a one-packet record ended in ``[T - L - d, T]``, and
after the previous record's packet left (``> T_prev - d``). A byte followed by ``m`` more
bytes in its record ended no later than ``T - m·c``. Bytes of one frame are back to back,
so each constraint on any byte of a frame bounds the frame's end; intersecting them all
gives the frame's end interval. A frame that straddles two records is pinned to within
about ``d + c`` — the sharper estimate of TIMING.md, at no extra cost.

Records that hold more than one packet's worth of bytes (the host read late) relax the
lower bound for their older bytes by one character time per byte beyond ``P``.

Carrying a bound from one record to a byte of another assumes the bytes between them came
back to back at pitch ``c``. Where that fails (the line's characters are longer than the
stated format says, a device paused inside a frame, the host delay exceeded ``d``) the
carried bounds can cross: the earliest end lies after the latest. The interval then falls
back to what the record holding the byte says without any pitch (its bytes ended after the
record's floor and by its read time), is never narrowed to a point, and the crossing is
counted in :attr:`Timeline.contradictions` for the report.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

_INF = float("inf")


@dataclass
class Timeline:
    """Byte positions of one port's stream mapped to the records that carried them.

    Positions are absolute (counted from the start of the port's stream); records no longer
    needed are dropped with :meth:`drop_before`. The records are kept as numpy columns that
    grow in place (room doubles when full, dropped records are moved out when they take
    half of it), so adding a run of records and bounding a run of frames cost work in
    proportion to that run, not to the records still held.
    """

    char_ns: float
    latency_ns: float
    host_delay_ns: float
    packet_bytes: int = 62
    untimed: bool = False
    #: frames whose carried bounds crossed, so their interval fell back to one record's own bounds
    contradictions: int = 0
    _last_t: int | None = None
    _next_pos: int = 0
    _lo: int = 0  # first record still held
    _n: int = 0   # records stored (held ones are _lo.._n)
    _ints: np.ndarray = field(default_factory=lambda: np.zeros((0, 3), dtype=np.int64), repr=False)
    _floors: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=np.float64), repr=False)

    # -- storage ----------------------------------------------------------------------------------
    def _room(self, more: int) -> None:
        """Make room for ``more`` records at the end (moving the held ones to the front, or growing)."""
        cap = self._floors.shape[0]
        if self._n + more <= cap:
            return
        held = self._n - self._lo
        if held + more <= cap // 2:
            self._ints[:held] = self._ints[self._lo:self._n]
            self._floors[:held] = self._floors[self._lo:self._n]
        else:
            size = max(64, 2 * (held + more))
            ints = np.zeros((size, 3), dtype=np.int64)
            floors = np.zeros(size, dtype=np.float64)
            ints[:held] = self._ints[self._lo:self._n]
            floors[:held] = self._floors[self._lo:self._n]
            self._ints, self._floors = ints, floors
        self._lo, self._n = 0, held

    @property
    def starts(self) -> np.ndarray:
        """Absolute position of each held record's first byte."""
        return self._ints[self._lo:self._n, 0]

    @property
    def lasts(self) -> np.ndarray:
        """Absolute position of each held record's last byte."""
        return self._ints[self._lo:self._n, 1]

    @property
    def times(self) -> np.ndarray:
        """Read-return time of each held record (ns)."""
        return self._ints[self._lo:self._n, 2]

    @property
    def floors(self) -> np.ndarray:
        """Earliest end of each held record's bytes (ns)."""
        return self._floors[self._lo:self._n]

    def last_start(self) -> int:
        """Absolute position of the last record's first byte (the stream's end when none is held)."""
        return int(self._ints[self._n - 1, 0]) if self._n > self._lo else self._next_pos

    def __len__(self) -> int:
        return self._n - self._lo

    # -- records in -------------------------------------------------------------------------------
    def add(self, t_ns: int, n: int) -> float:
        """Register a record of ``n`` bytes read at ``t_ns``; return the least silence before it (ns).

        The silence bound is ``-inf`` for the first record and for untimed captures.
        """
        prev = self._last_t
        start = self._next_pos
        self._next_pos += n
        self._last_t = t_ns
        floor = t_ns - self.latency_ns - self.host_delay_ns
        if prev is not None and n <= self.packet_bytes:
            floor = max(floor, prev - self.host_delay_ns)
        self._room(1)
        k = self._n
        self._ints[k] = (start, start + n - 1, t_ns)
        self._floors[k] = floor
        self._n = k + 1
        if prev is None or self.untimed:
            return float("-inf")
        # TIMING.md: silence >= T_{i+1} - L - d - n·c - T_i
        return t_ns - self.latency_ns - self.host_delay_ns - n * self.char_ns - prev

    def add_many(self, t_ns: np.ndarray, n: np.ndarray) -> np.ndarray:
        """:meth:`add` for many records at once (all with bytes); returns the least silence before each."""
        count = t_ns.shape[0]
        if count == 0:
            return np.zeros(0)
        t = t_ns.astype(np.float64)
        prev = np.empty(count)
        prev[0] = np.nan if self._last_t is None else self._last_t
        prev[1:] = t[:-1]
        ends = self._next_pos + np.cumsum(n)
        starts = ends - n
        floor = t - self.latency_ns - self.host_delay_ns
        one_packet = (n <= self.packet_bytes) & ~np.isnan(prev)
        floor[one_packet] = np.maximum(floor[one_packet], prev[one_packet] - self.host_delay_ns)
        silence = t - self.latency_ns - self.host_delay_ns - n * self.char_ns - prev
        silence[np.isnan(prev)] = -np.inf
        if self.untimed:
            silence[:] = -np.inf
        self._room(count)
        k = self._n
        self._ints[k:k + count, 0] = starts
        self._ints[k:k + count, 1] = ends - 1
        self._ints[k:k + count, 2] = t_ns
        self._floors[k:k + count] = floor
        self._n = k + count
        self._next_pos = int(ends[-1])
        self._last_t = int(t_ns[-1])
        return silence

    def drop_before(self, pos: int) -> None:
        """Forget records whose bytes all lie before absolute position ``pos``."""
        self._lo += int(np.searchsorted(self.lasts, pos - 1, "right"))

    def held_up(self, pos: np.ndarray) -> np.ndarray:
        """For records starting at absolute ``pos``: where the next record starts if this read was held up.

        A read held up in the host (its delay far over the usual) shows a silence before it
        that was never on the wire. It gives itself away when the next read comes back less
        than a latency period after it with a timer packet: that packet left the adapter at
        least ``L`` after this read's packet (the timer restarts after every packet), so this
        read waited at least ``L`` minus the interval between the two returns — over
        ``min(d, L/2)`` here, far over the usual delay (TIMING.md). Returns the next
        record's start for such reads, ``-1`` for the others (and where no next record is
        held yet).
        """
        pos = np.asarray(pos, dtype=np.int64)
        starts = self.starts
        k = np.searchsorted(starts, pos)
        nxt = k + 1
        has = (k < starts.shape[0]) & (nxt < starts.shape[0])
        out = np.full(pos.shape[0], -1, dtype=np.int64)
        if not has.any():
            return out
        k, nxt = k[has], nxt[has]
        lasts, times = self.lasts, self.times
        limit = self.latency_ns - min(self.host_delay_ns, self.latency_ns / 2)
        timer = lasts[nxt] - starts[nxt] + 1 < self.packet_bytes
        quick = (times[nxt] - times[k]) < limit
        sel = (starts[k] == pos[has]) & timer & quick
        out[np.flatnonzero(has)[sel]] = starts[nxt][sel]
        return out

    # -- bounds -----------------------------------------------------------------------------------
    def end_bounds(self, first: int, last: int) -> tuple[int, int]:
        """Interval for the end (stop bit) of the byte at ``last``, for a frame spanning ``first..last``."""
        c = self.char_ns
        all_starts = self.starts
        i = max(0, int(np.searchsorted(all_starts, first, "right")) - 1)
        j = int(np.searchsorted(all_starts, last, "right"))
        lo = float("-inf")
        hi = _INF
        own = (float("-inf"), _INF)
        p = self.packet_bytes
        if j > i:
            rows = self._ints[self._lo + i:self._lo + j].tolist()
            floors = self._floors[self._lo + i:self._lo + j].tolist()
            for (start, end, t), floor in zip(rows, floors):
                k0 = max(first, start, end - p + 1)
                if k0 <= last:
                    lo = max(lo, floor + (last - k0) * c)
                    own = (floor, float(t))
                else:
                    lo = max(lo, floor - (k0 - last) * c)
                    own = (floor - (k0 - last) * c, float(t))
                hi = min(hi, t + (last - end) * c)
        if self.untimed or lo == float("-inf"):
            lo = hi
        elif lo > hi:
            # the carried bounds crossed: widen to the byte's own record, never to a point
            self.contradictions += 1
            lo, hi = min(own[0], hi), own[1]
        return round(lo), round(hi)

    def end_bounds_many(self, first: np.ndarray, last: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """:meth:`end_bounds` for many frames (absolute positions, in stream order).

        Only the records the frames span are read, so the cost follows the frames.
        """
        all_starts = self.starts
        a = max(0, int(np.searchsorted(all_starts, first[0], "right")) - 1)
        b = int(np.searchsorted(all_starts, last[-1], "right"))
        starts = all_starts[a:b]
        lasts = self.lasts[a:b]
        times = self.times[a:b].astype(np.float64)
        floors = self.floors[a:b]
        c = self.char_ns
        ra = np.maximum(np.searchsorted(starts, first, "right") - 1, 0)
        rb = np.searchsorted(starts, last, "right") - 1
        e = last.astype(np.float64)
        # Latest end: every record's last byte ended by its read time; min over the frame's records.
        h = np.append(times - lasts * c, np.inf)
        hi = np.minimum.reduceat(h, np.ravel(np.column_stack((ra, rb + 1))))[::2] + e * c
        # Earliest end, first record: its bytes from the frame's first (or the last P) on.
        k0 = np.maximum(first, lasts[ra] - self.packet_bytes + 1)
        lo = floors[ra] + (e - k0) * c
        # Later records lie wholly inside the frame.
        more = rb > ra
        if more.any():
            g = np.append(floors - np.maximum(starts, lasts - self.packet_bytes + 1) * c, -np.inf)
            sel = np.flatnonzero(more)
            idx = np.ravel(np.column_stack((ra[sel] + 1, rb[sel] + 1)))
            lo[sel] = np.maximum(lo[sel], np.maximum.reduceat(g, idx)[::2] + e[sel] * c)
        if self.untimed:
            lo = hi.copy()
        else:
            crossed = np.flatnonzero(lo > hi)
            if crossed.size:
                # as in end_bounds: the byte's own record, without any pitch
                self.contradictions += int(crossed.size)
                j = rb[crossed]
                k0j = np.maximum(np.maximum(first[crossed], starts[j]), lasts[j] - self.packet_bytes + 1)
                own_lo = floors[j] - np.maximum(k0j - last[crossed], 0) * c
                lo[crossed] = np.minimum(own_lo, hi[crossed])
                hi[crossed] = times[j]
        return np.rint(lo).astype(np.int64), np.rint(hi).astype(np.int64)
