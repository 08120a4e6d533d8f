"""The USB serial adapter between the bus and the host, as ``/work/shared/TIMING.md`` describes it.

Bytes reach the adapter when their stop bit ends. The adapter sends a packet when 62 data
bytes are buffered (a full-buffer packet), or when its latency timer expires. The timer
restarts after every packet, and the part sends an (empty) status packet at every expiry
even when idle, so packets fall on a grid of period L that only a full-buffer packet
re-phases (AN232B-04, "Small Amounts of Data"). The host's ``read()`` returns a delay ``d``
later (a fraction of a millisecond, now and then a few ms). One record per delivered chunk,
stamped with the host time; an empty status packet produces no record. A byte the UART
marked (parity or framing error, break) is its own record with the mark's flag and the same
timestamp as its chunk, as live capture stores PARMRK marks.
"""

from __future__ import annotations

import numpy as np
from buswitness.capture.fileformat import RecordBatch
from buswitness.simulate.scenario import Adapter

FULL_BUFFER_BYTES = 62  # AN232B-04: 64-byte packet = 2 status + 62 data


def packet_times(arrival: np.ndarray, latency_ns: int, phase_ns: int,
                 cap: int = FULL_BUFFER_BYTES) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Split sorted byte arrival times into packets.

    Returns (end index of each packet, packet send time, grid phase after each packet).
    Vectorised where no tick holds ``cap`` bytes; a back-to-back run of full-buffer packets
    (a saturated fast bus) is walked one packet at a time.
    """
    a = np.asarray(arrival, dtype=np.int64)
    n = len(a)
    L = int(latency_ns)
    ends: list[np.ndarray] = []
    times: list[np.ndarray] = []
    phases: list[np.ndarray] = []
    i = 0
    p = int(phase_ns)
    window = 1 << 16
    while i < n:
        j = min(n, i + window)
        seg = a[i:j]
        k = np.maximum((seg - p + L - 1) // L, 1)
        change = np.flatnonzero(np.diff(k)) + 1
        run_start = np.r_[0, change]
        run_end = np.r_[change, len(seg)]
        big = np.flatnonzero(run_end - run_start >= cap)
        if len(big):
            r = int(big[0])
            if r:
                ends.append(i + run_end[:r])
                times.append(p + k[run_start[:r]] * L)
                phases.append(np.full(r, p, dtype=np.int64))
            e = i + int(run_start[r]) + cap
            p = int(a[e - 1])
            ends.append(np.array([e]))
            times.append(np.array([p]))
            phases.append(np.array([p]))
            i = e
            # a saturated line: full buffers keep coming before the timer can expire
            fe: list[int] = []
            while i + cap <= n and int(a[i + cap - 1]) <= p + L:
                p = int(a[i + cap - 1])
                i += cap
                fe.append(i)
            if fe:
                fea = np.asarray(fe, dtype=np.int64)
                ft = a[fea - 1]
                ends.append(fea)
                times.append(ft)
                phases.append(ft)
            continue
        last = len(run_start) if j == n else len(run_start) - 1
        if last == 0:
            last = len(run_start)
        ends.append(i + run_end[:last])
        times.append(p + k[run_start[:last]] * L)
        phases.append(np.full(last, p, dtype=np.int64))
        i += int(run_end[last - 1])
    if not ends:
        z = np.zeros(0, dtype=np.int64)
        return z, z, z
    return (np.concatenate(ends).astype(np.int64), np.concatenate(times).astype(np.int64),
            np.concatenate(phases).astype(np.int64))


class AdapterModel:
    """Turns delivered bytes into host records, slice after slice, carrying the unsent tail over."""

    def __init__(self, cfg: Adapter, rng: np.random.Generator, t0_ns: int, port: int = 0) -> None:
        self.cfg = cfg
        self.rng = rng
        self.latency_ns = max(1, round(cfg.latency_ms * 1e6))
        self.phase = int(t0_ns)
        self.port = port
        self.last_t = int(t0_ns)
        self.carry = (np.zeros(0, np.int64), np.zeros(0, np.uint8), np.zeros(0, np.uint8))

    def _host_delay(self, n: int) -> np.ndarray:
        c = self.cfg
        base = c.host_delay_ms * 1e6
        d = 0.5 * base + self.rng.exponential(0.5 * base if base > 0 else 1.0, size=n) * (base > 0)
        tail = self.rng.random(n) < c.host_delay_tail_rate
        d[tail] += self.rng.uniform(0.5, 1.5, size=int(tail.sum())) * c.host_delay_tail_ms * 1e6
        return np.round(d).astype(np.int64)

    def feed(self, arrival: np.ndarray, value: np.ndarray, flags: np.ndarray, t_cut_ns: int | None) -> RecordBatch:
        """Records of every packet sent by ``t_cut_ns`` (all of them when it is None: end of capture)."""
        a = np.concatenate((self.carry[0], np.asarray(arrival, dtype=np.int64)))
        v = np.concatenate((self.carry[1], np.asarray(value, dtype=np.uint8)))
        f = np.concatenate((self.carry[2], np.asarray(flags, dtype=np.uint8)))
        ends, times, phases = packet_times(a, self.latency_ns, self.phase)
        keep = len(ends) if t_cut_ns is None else int(np.searchsorted(times, t_cut_ns, side="right"))
        used = int(ends[keep - 1]) if keep else 0
        if keep:
            self.phase = int(phases[keep - 1])
        self.carry = (a[used:], v[used:], f[used:])
        ends, times = ends[:keep], times[:keep]
        if not keep:
            return RecordBatch.empty()
        host = np.maximum.accumulate(np.maximum(times + self._host_delay(keep), self.last_t))
        self.last_t = int(host[-1])
        # split each packet so that every marked byte is a record of its own
        starts = np.r_[0, ends[:-1]]
        marked = np.flatnonzero(f[:used] != 0)
        bounds = np.unique(np.concatenate((starts, marked, marked + 1)))
        bounds = bounds[bounds < used]
        lengths = np.diff(np.r_[bounds, used])
        packet_of = np.searchsorted(ends, bounds, side="right")
        rec_flags = np.zeros(len(bounds), dtype=np.uint8)
        single = lengths == 1
        rec_flags[single] = f[bounds[single]]
        return RecordBatch(t_ns=host[packet_of], length=lengths.astype(np.int64),
                           port=np.full(len(bounds), self.port, dtype=np.uint8), flags=rec_flags,
                           payload=v[:used].copy())
