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
_NO_POS = np.zeros(0, dtype=np.int64)
_NO_SILENCE = np.zeros(0)


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
    #: per record: first byte, last byte, read time, first byte of its floor's window (absolute;
    #: records returned at one instant are one read)
    _ints: np.ndarray = field(default_factory=lambda: np.zeros((0, 4), dtype=np.int64), repr=False)
    #: per record: earliest end of the bytes in its window, and of its bytes before the window (ns)
    _floors: np.ndarray = field(default_factory=lambda: np.zeros((0, 2), dtype=np.float64), repr=False)

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
            ints = np.zeros((size, 4), dtype=np.int64)
            floors = np.zeros((size, 2), dtype=np.float64)
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
        """Earliest end of each held record's bytes in its window (ns)."""
        return self._floors[self._lo:self._n, 0]

    @property
    def pre_floors(self) -> np.ndarray:
        """Earliest end of each held record's bytes before its window (ns)."""
        return self._floors[self._lo:self._n, 1]

    @property
    def windows(self) -> np.ndarray:
        """Absolute position of the first byte of each held record's window: the bytes its read's
        last packet may hold, which ended no earlier than its floor."""
        return self._ints[self._lo:self._n, 3]

    def last_start(self) -> int:
        """Absolute position of the last record's first byte (the stream's end when none is held)."""
        return int(self._ints[self._n - 1, 0]) if self._n > self._lo else self._next_pos

    def __len__(self) -> int:
        return self._n - self._lo

    # -- records in -------------------------------------------------------------------------------
    # A read is judged once the read after it is known: records returned at the same instant
    # are parts of one read (a capture splits a read at a marked byte), and the next read's
    # time bounds this one's packet (see _read_floors). Until then the last read is pending;
    # the decoder frames nothing that touches it (decoder._Port._scan_end).
    _p_t: float = float("nan")    # pending read: its time (nan: none yet)
    _p_n: int = 0                  # its bytes so far
    _p_rows: int = 0               # its records (the last rows stored)
    _p_pos: int = 0                # absolute position of its first byte
    _p_prev: float = float("nan")  # the time of the read before it

    def add(self, t_ns: int, n: int) -> tuple[np.ndarray, np.ndarray]:
        """Register a record of ``n`` bytes read at ``t_ns``; see :meth:`add_many`.

        The same rules in plain Python for one record (the record-by-record path takes every
        record of a noisy line through here, where numpy's fixed cost per call would dominate);
        tests/test_decode_scenarios_equal.py holds both to the same tables.
        """
        t_ns, n = int(t_ns), int(n)
        if n <= 0:
            return _NO_POS, _NO_SILENCE
        start = self._next_pos
        self._room(1)
        k = self._n
        self._ints[k] = (start, start + n - 1, t_ns, start)
        self._floors[k] = t_ns - self.latency_ns - self.host_delay_ns  # until judged
        self._n = k + 1
        self._next_pos = start + n
        self._last_t = t_ns
        t = float(t_ns)
        p_t = self._p_t
        if p_t == t:  # a further part of the pending read
            self._p_n += n
            self._p_rows += 1
            fw, fpre, wlen, _silence = self._read_floors_one(t, self._p_n, self._p_prev, None, 0)
            self._store_one(self._p_rows, self._p_pos + self._p_n - wlen, fw, fpre)
            return _NO_POS, _NO_SILENCE
        done_pos = done_silence = None
        if p_t == p_t:  # the pending read is complete: judge it, this record's read after it
            fw, fpre, wlen, done_silence = self._read_floors_one(p_t, self._p_n, self._p_prev, t, n)
            self._store_one(self._p_rows, self._p_pos + self._p_n - wlen, fw, fpre, below=1)
            done_pos = self._p_pos
        fw, fpre, wlen, _silence = self._read_floors_one(t, n, p_t, None, 0)
        self._store_one(1, start + n - wlen, fw, fpre)
        self._p_t, self._p_n, self._p_rows, self._p_pos, self._p_prev = t, n, 1, start, p_t
        if done_pos is None:
            return _NO_POS, _NO_SILENCE
        return np.array([done_pos], dtype=np.int64), np.array([done_silence])

    def _read_floors_one(self, t: float, n: int, prev: float, nxt_t: float | None,
                         nxt_n: int) -> tuple[float, float, int, float]:
        """:meth:`_read_floors` for one read (``nxt_t`` None: the read after it is not known yet)."""
        L, d, c, P = self.latency_ns, self.host_delay_ns, self.char_ns, self.packet_bytes
        eff = t
        if nxt_t is not None and nxt_n < P:
            eff = min(t, nxt_t - L)
        has_prev = prev == prev
        one_packet = n <= P and n * c <= L + c
        fw = eff - L - d
        if one_packet and has_prev:
            fw = max(fw, prev - d)
        fpre = prev - d if has_prev else fw - (n + 1) * L
        fpre = min(fpre, fw)
        wlen = n if one_packet else (P if n > P else 1)
        silence = eff - L - d - n * c - prev if has_prev and not self.untimed else -_INF
        return fw, fpre, wlen, silence

    def _store_one(self, rows: int, window: int, fw: float, fpre: float, below: int = 0) -> None:
        """:meth:`_store` for one read: its ``rows`` records, which end ``below`` rows before the last."""
        stop = self._n - below
        first = max(stop - rows, self._lo)
        if first + 1 == stop:  # one record (the usual case): two writes
            self._ints[first, 3] = window
            self._floors[first] = (fw, fpre)
        elif first < stop:
            self._ints[first:stop, 3] = window
            self._floors[first:stop] = (fw, fpre)

    def add_many(self, t_ns: np.ndarray, n: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Register records (each with bytes, in time order); return the reads they complete.

        Returns the absolute position of each completed read's first byte and the least
        silence before it (ns; ``-inf`` where none can be shown: the first read, a read of
        several packets, an untimed capture). The last read stays pending until a later
        record or :meth:`finish` completes it.
        """
        count = t_ns.shape[0]
        if count == 0:
            return np.zeros(0, dtype=np.int64), np.zeros(0)
        t_ns = np.asarray(t_ns, dtype=np.int64)
        n = np.asarray(n, dtype=np.int64)
        ends = self._next_pos + np.cumsum(n)
        starts = ends - n
        self._room(count)
        k = self._n
        self._ints[k:k + count, 0] = starts
        self._ints[k:k + count, 1] = ends - 1
        self._ints[k:k + count, 2] = t_ns
        self._ints[k:k + count, 3] = starts
        self._floors[k:k + count] = t_ns[:, None] - self.latency_ns - self.host_delay_ns  # until judged
        self._n = k + count
        self._next_pos = int(ends[-1])
        self._last_t = int(t_ns[-1])
        t = t_ns.astype(np.float64)
        prev = np.empty(count)
        prev[0] = self._p_t
        prev[1:] = t[:-1]
        opens = np.flatnonzero(t != prev)  # records that begin a new read
        pending = not np.isnan(self._p_t)
        # reads: the pending one (if any) first, then the new ones
        g_first = opens if not pending or (opens.size and opens[0] == 0) else np.concatenate(([0], opens))
        g_t = t[g_first]
        g_n = np.add.reduceat(n, g_first) if g_first.size else np.zeros(0, dtype=np.int64)
        g_rows = np.diff(np.append(g_first, count))
        g_pos = starts[g_first]
        g_lead = n[g_first]  # each read's first record: what the read before it is judged by
        carry = pending and not (opens.size and opens[0] == 0)
        if pending:
            if carry:  # the first records continue the pending read
                g_n[0] += self._p_n
                g_rows[0] += self._p_rows
                g_pos[0] = self._p_pos
                g_prev0 = self._p_prev
            else:  # the pending read is complete: it leads the list
                g_t = np.concatenate(([self._p_t], g_t))
                g_n = np.concatenate(([self._p_n], g_n))
                g_rows = np.concatenate(([self._p_rows], g_rows))
                g_pos = np.concatenate(([self._p_pos], g_pos))
                g_lead = np.concatenate(([0], g_lead))  # (the pending read's own is never read)
                g_prev0 = self._p_prev
        else:
            g_prev0 = float("nan")
        g_prev = np.empty(g_t.shape[0])
        g_prev[0] = g_prev0
        g_prev[1:] = g_t[:-1]
        fw, fpre, wlen, silence = self._read_floors(g_t, g_n, g_prev, g_lead, complete=g_t.shape[0] - 1)
        self._store(g_rows, g_pos + g_n - wlen, fw, fpre)
        self._p_t, self._p_n, self._p_rows = float(g_t[-1]), int(g_n[-1]), int(g_rows[-1])
        self._p_pos, self._p_prev = int(g_pos[-1]), float(g_prev[-1])
        return g_pos[:-1], silence[:-1]

    def pending_start(self) -> int:
        """Absolute position of the pending read's first byte (the stream's end when none is pending)."""
        return self._next_pos if self._p_t != self._p_t else self._p_pos  # nan: none pending

    def finish(self) -> tuple[np.ndarray, np.ndarray]:
        """End of input: complete the pending read (nothing follows to bound it); as :meth:`add_many`."""
        if np.isnan(self._p_t):
            return np.zeros(0, dtype=np.int64), np.zeros(0)
        g_t, g_n, g_prev = np.array([self._p_t]), np.array([self._p_n]), np.array([self._p_prev])
        fw, fpre, wlen, silence = self._read_floors(g_t, g_n, g_prev, g_n, complete=0)
        g_pos = np.array([self._p_pos])
        self._store(np.array([self._p_rows]), g_pos + g_n - wlen, fw, fpre)
        pos = np.array([self._p_pos], dtype=np.int64)
        self._p_t, self._p_n, self._p_rows = float("nan"), 0, 0
        return pos, silence

    def _store(self, g_rows: np.ndarray, g_window: np.ndarray, fw: np.ndarray, fpre: np.ndarray) -> None:
        """Write each read's window and floors into its records (the last ``g_rows.sum()`` stored)."""
        first_row = self._n - int(g_rows.sum())
        skip = max(first_row, self._lo) - first_row
        rows = slice(first_row + skip, self._n)
        self._ints[rows, 3] = np.repeat(g_window, g_rows)[skip:]
        self._floors[rows, 0] = np.repeat(fw, g_rows)[skip:]
        self._floors[rows, 1] = np.repeat(fpre, g_rows)[skip:]

    def _read_floors(self, g_t: np.ndarray, g_n: np.ndarray, g_prev: np.ndarray, g_lead: np.ndarray,
                     complete: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Floors, window length and the least silence before each read (TIMING.md).

        Returns, per read: the earliest end of the bytes in its window, the earliest end of its
        bytes before the window, the window's length (its last bytes), and the least silence
        before it (ns).

        The first ``complete`` reads have the read after them in the list, and that read's time
        bounds this one's last packet: with fewer than ``P`` bytes the next read held only timer
        packets, and the timer restarts after every packet, so this read's packet left at least
        ``L`` before the next read returned. The next read is judged by its first record
        (``g_lead``; a capture splits a read at a marked byte), as :meth:`held_up` judges it:
        what has arrived when this read is judged, however the records are cut into calls. A read the host held up beyond the usual delay
        ``d`` so bounds from its effective time ``min(T, T_next - L)``, not from when it came
        back (its last packet then taken to be the one before the next read's: common
        practice for continuous traffic, where a data packet leaves on every timer expiry).

        The bytes of one packet ended within one latency period, so a read can be one packet
        only if its bytes fit in it (``n·c <= L + c``, and ``n <= P``). Then all its bytes are
        taken to have ended after its floor (the window is the whole read), a held-up read's
        too: a host stalled across a timer expiry with bytes waiting would merge two packets
        that fit in one, which no timestamp shows (the likely case is taken, as for every
        read; a first try that took such reads as several packets left the request ends of a
        16 ms adapter tens of milliseconds off, tests/test_decode_oracle.py). A read of more
        may hold several packets: only its last byte is known to have ended after the floor
        (a full-buffer read: its last ``P``), and its earlier bytes only after the read before
        it (the pre-window floor, ``T_prev - d``).
        """
        L, d, c, P = self.latency_ns, self.host_delay_ns, self.char_ns, self.packet_bytes
        m = g_t.shape[0]
        eff = g_t.copy()
        if m > 1 and complete:
            nxt_t = g_t[1:complete + 1]
            timer = g_lead[1:complete + 1] < P
            eff[:complete] = np.where(timer, np.minimum(g_t[:complete], nxt_t - L), g_t[:complete])
        has_prev = ~np.isnan(g_prev)
        one_packet = (g_n <= P) & (g_n * c <= L + c)
        fw = eff - L - d
        lift = one_packet & has_prev
        fw[lift] = np.maximum(fw[lift], g_prev[lift] - d)
        # before the window: after the read before it; the first read of all, after a packet per byte
        fpre = np.where(has_prev, g_prev - d, fw - (g_n + 1) * L)
        fpre = np.minimum(fpre, fw)
        wlen = np.where(one_packet, g_n, np.where(g_n > P, P, 1)).astype(np.int64)
        silence = eff - L - d - g_n * c - g_prev
        silence[~has_prev] = -np.inf
        if self.untimed:
            silence[:] = -np.inf
        return fw, fpre, wlen, silence

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
        """Interval for the end (stop bit) of the byte at ``last``, for a frame spanning ``first..last``.

        :meth:`end_bounds_many` for one frame, in plain Python (the record-by-record path bounds
        every frame through here); the same arithmetic in the same order, so the same numbers.
        """
        first, last = int(first), int(last)
        all_starts = self.starts
        if all_starts.size == 0:
            raise ValueError("no record holds these bytes")
        a = max(0, int(np.searchsorted(all_starts, first, "right")) - 1)
        b = int(np.searchsorted(all_starts, last, "right"))
        rows = self._ints[self._lo + a:self._lo + max(b, a + 1)].tolist()
        floors = self._floors[self._lo + a:self._lo + max(b, a + 1)].tolist()
        c = self.char_ns
        e = float(last)
        rb = max(b - a - 1, 0)
        hi = min(float(t) - end * c for _start, end, t, _ws in rows[:rb + 1]) + e * c

        def bound(r: int, k0: int, kl: int) -> float:
            ws = rows[r][3]
            fw, fpre = floors[r]
            w = max(k0, ws)
            win = fw + (e - w) * c if kl >= ws else -_INF
            return max(win, fpre + (e - k0) * c)

        lo = bound(0, max(first, rows[0][0]), min(last, rows[0][1]))
        if rb > 0:
            lo = max(lo, bound(rb, rows[rb][0], last))
            if rb >= 2:
                g = max(max(fw - max(start, ws) * c, fpre - start * c)
                        for (start, _end, _t, ws), (fw, fpre) in zip(rows[1:rb], floors[1:rb]))
                lo = max(lo, g + e * c)
        if self.untimed:
            lo = hi
        elif lo > hi:
            # the carried bounds crossed: the byte's own record, without any pitch, never a point
            self.contradictions += 1
            ws, t = rows[rb][3], rows[rb][2]
            own_lo = floors[rb][0] if last >= ws else floors[rb][1]
            lo = min(own_lo, hi)
            hi = float(t)
        return int(np.rint(lo)), int(np.rint(hi))

    def end_bounds_many(self, first: np.ndarray, last: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Interval for the end of each frame's last byte (absolute positions, in stream order).

        Every record the frame touches bounds it, the frame's bytes being back to back: its
        read time from above (less a character per byte after), its floors from below (the
        window's floor from the first window byte in the frame, the pre-window floor from the
        frame's first byte in the record). Only the records the frames span are read, so the
        cost follows the frames.
        """
        first = np.asarray(first, dtype=np.int64)
        last = np.asarray(last, dtype=np.int64)
        all_starts = self.starts
        if first.size == 0:
            z = np.zeros(0, dtype=np.int64)
            return z, z
        if all_starts.size == 0:
            raise ValueError("no record holds these bytes")
        a = max(0, int(np.searchsorted(all_starts, first[0], "right")) - 1)
        b = int(np.searchsorted(all_starts, last[-1], "right"))
        starts = all_starts[a:b]
        lasts = self.lasts[a:b]
        times = self.times[a:b].astype(np.float64)
        fw = self.floors[a:b]
        fpre = self.pre_floors[a:b]
        ws = self.windows[a:b]
        c = self.char_ns
        ra = np.maximum(np.searchsorted(starts, first, "right") - 1, 0)
        rb = np.maximum(np.searchsorted(starts, last, "right") - 1, 0)
        e = last.astype(np.float64)
        # Latest end: every record's last byte ended by its read time; min over the frame's records.
        h = np.append(times - lasts * c, np.inf)
        hi = np.minimum.reduceat(h, np.ravel(np.column_stack((ra, rb + 1))))[::2] + e * c

        def bound(r: np.ndarray, k0: np.ndarray, kl: np.ndarray, ee: np.ndarray) -> np.ndarray:
            w = np.maximum(k0, ws[r])
            win = np.where(kl >= ws[r], fw[r] + (ee - w) * c, -np.inf)
            return np.maximum(win, fpre[r] + (ee - k0) * c)

        first_k0 = np.maximum(first, starts[ra])
        lo = bound(ra, first_k0, np.minimum(last, lasts[ra]), e)
        more = np.flatnonzero(rb > ra)
        if more.size:
            r = rb[more]
            lo[more] = np.maximum(lo[more], bound(r, starts[r], last[more], e[more]))
            mid = more[rb[more] - ra[more] >= 2]
            if mid.size:
                g = np.append(np.maximum(fw - np.maximum(starts, ws) * c, fpre - starts * c), -np.inf)
                idx = np.ravel(np.column_stack((ra[mid] + 1, rb[mid])))
                lo[mid] = np.maximum(lo[mid], np.maximum.reduceat(g, idx)[::2] + e[mid] * c)
        if self.untimed:
            lo = hi.copy()
        else:
            crossed = np.flatnonzero(lo > hi)
            if crossed.size:
                # the carried bounds crossed: the byte's own record, without any pitch, never a point
                self.contradictions += int(crossed.size)
                j = rb[crossed]
                own_lo = np.where(last[crossed] >= ws[j], fw[j], fpre[j])
                lo[crossed] = np.minimum(own_lo, hi[crossed])
                hi[crossed] = times[j]
        return np.rint(lo).astype(np.int64), np.rint(hi).astype(np.int64)
