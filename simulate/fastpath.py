"""The poll schedule of a fault-free bus, computed whole cycles at a time with numpy.

When nothing can go wrong (no noise, no events, every polled station present once and always
answering within the master's timeout), a transaction's length depends only on its own draws,
so request times are cumulative sums: per cycle, the busy time is the sum of its transactions
and the next cycle starts ``max(period, busy)`` later. This is what makes a saturated 24-hour
115200 baud capture (some 25 million frames) quick to generate. The result is the same kind
of :class:`~buswitness.simulate.bus.WireSlice` the per-transaction loop makes, following the
same rules (broadcasts wait the broadcast delay, other transactions the inter-poll delay).
"""

from __future__ import annotations

import numpy as np
from buswitness.decode.crc import crc16_rows
from buswitness.simulate.bus import (
    BROADCAST,
    EXCEPTION,
    KIND_BROADCAST,
    KIND_REQUEST,
    KIND_RESPONSE,
    MASTER,
    OK,
    Bus,
    WireSlice,
)
from buswitness.simulate.pdus import exception_frame, response_data_length, response_frame
from buswitness.simulate.scenario import Scenario

#: Cycles computed per numpy step.
CYCLES_PER_STEP = 4096


def is_plain(sc: Scenario) -> bool:
    """True when the scenario has no fault that makes one transaction depend on another."""
    if sc.events:
        return False
    present: dict[int, int] = {}
    for st in sc.stations:
        if st.absent or sc.station_ber(st) > 0 or st.gap_rate > 0 or st.response.tail_rate > 0:
            return False
        if st.response.fixed_ms + st.response.jitter_ms >= sc.master.timeout_ms:
            return False
        present[st.address] = present.get(st.address, 0) + 1
    if any(n > 1 for n in present.values()):
        return False
    return all(p.station == 0 or present.get(p.station) == 1 for p in sc.master.polls)


class PlainSchedule:
    """Whole cycles of a fault-free bus; ``run_slice`` has the same contract as :meth:`Bus.run_slice`."""

    def __init__(self, bus: Bus) -> None:
        self.bus = bus
        sc = bus.sc
        self.rng = bus.u.rng
        polls = sc.master.polls
        self.n_polls = len(polls)
        self.every = np.array([p.every_cycles for p in polls], dtype=np.int64)
        self.station_of = {st.address: i for i, st in enumerate(sc.stations)}
        self.req_len = np.array([len(r) for r in bus.requests], dtype=np.int64)
        self.is_bcast = np.array([p.station == 0 for p in polls])
        idx = [self.station_of.get(p.station, -1) for p in polls]
        self.st_idx = np.array(idx, dtype=np.int64)
        st = [sc.stations[i] if i >= 0 else None for i in idx]
        self.fixed = np.array([s.response.fixed_ms if s else 0.0 for s in st])
        self.jitter = np.array([s.response.jitter_ms if s else 0.0 for s in st])
        self.exc_rate = np.array([s.exception_rate if s else 0.0 for s in st])
        self.resp_len = np.array([len(response_frame(p.station, p, bus.requests[i], bytes(256),
                                                     s.device_id.encode("utf-8") if s else b""))
                                  for i, (p, s) in enumerate(zip(polls, st))], dtype=np.int64)
        self.cycle = 0
        self.cycle_start = bus.t

    def _frame_ns(self, n: np.ndarray) -> np.ndarray:
        return np.round(n * self.bus.c_ns).astype(np.int64)

    def run_slice(self, t_until_ns: int) -> WireSlice:
        bus = self.bus
        s = WireSlice(t_begin_ns=bus.t, t_end_ns=t_until_ns)
        stop = min(t_until_ns, bus.t_stop_ns)
        parts = []
        while bus.t < stop:
            parts.append(self._cycles(stop))
        self._fill(s, parts)
        s.t_end_ns = min(bus.t, bus.t_stop_ns)
        if s.f_end:
            s.t_end_ns = max(s.t_end_ns, int(s.f_end[-1]))
        return s

    def _cycles(self, stop: int) -> dict:
        bus = self.bus
        k = np.arange(self.cycle, self.cycle + CYCLES_PER_STEP, dtype=np.int64)
        due = (k[:, None] % self.every[None, :]) == 0
        cyc, entry = np.nonzero(due)
        m = len(entry)
        u = self.rng.random((3, m))
        bcast = self.is_bcast[entry]
        rt_ns = ((self.fixed[entry] + self.jitter[entry] * u[0]) * 1e6).astype(np.int64)
        exc = (u[1] < self.exc_rate[entry]) & ~bcast
        resp_len = np.where(exc, 5, self.resp_len[entry])
        req_ns = self._frame_ns(self.req_len[entry])
        resp_ns = self._frame_ns(resp_len)
        dur = np.where(bcast, req_ns + bus.bcast_delay_ns, req_ns + rt_ns + resp_ns + bus.delay_ns)
        busy = np.bincount(cyc, weights=dur, minlength=CYCLES_PER_STEP).astype(np.int64)
        step = np.maximum(busy, bus.period_ns)
        starts_c = self.cycle_start + np.concatenate(([0], np.cumsum(step)[:-1]))
        first = np.r_[0, np.flatnonzero(np.diff(cyc)) + 1]
        within = np.cumsum(dur) - dur
        within -= np.repeat(within[first], np.diff(np.r_[first, m]))
        t_req = starts_c[cyc] + within
        keep = t_req < stop
        # whole cycles only, so a slice never ends inside one
        n_cycles = int(cyc[keep].max()) + 1 if keep.any() else 1
        keep = cyc < n_cycles
        if bus.t_stop_ns <= stop:
            keep &= t_req < bus.t_stop_ns
        self.cycle += n_cycles
        self.cycle_start = int(starts_c[n_cycles - 1] + step[n_cycles - 1])
        bus.t = self.cycle_start
        sel = np.flatnonzero(keep)
        return {"entry": entry[sel], "t_req": t_req[sel], "req_ns": req_ns[sel], "rt_ns": rt_ns[sel],
                "resp_ns": resp_ns[sel], "exc": exc[sel], "u_code": u[2][sel]}

    def _responses(self, entry: np.ndarray, exc: np.ndarray, u_code: np.ndarray) -> list[bytes]:
        """Response frames, built group by group (one poll entry at a time) with the numpy CRC."""
        bus = self.bus
        sc = bus.sc
        out: list[bytes] = [b""] * len(entry)
        for e in np.unique(entry).tolist():
            poll = sc.master.polls[e]
            if poll.station == 0:
                continue
            st = sc.stations[self.station_of[poll.station]]
            rows = np.flatnonzero((entry == e) & ~exc)
            n_data = response_data_length(poll)
            if n_data:
                body = np.empty((len(rows), 3 + n_data), dtype=np.uint8)
                body[:, 0] = st.address
                body[:, 1] = poll.function
                body[:, 2] = n_data
                body[:, 3:] = self.rng.integers(0, 256, size=(len(rows), n_data), dtype=np.uint8)
                crc = crc16_rows(body)
                frames = np.hstack((body, (crc & 0xFF).astype(np.uint8)[:, None],
                                    (crc >> 8).astype(np.uint8)[:, None]))
                for r, fr in zip(rows.tolist(), frames):
                    out[r] = fr.tobytes()
            else:
                fixed = response_frame(st.address, poll, bus.requests[e], b"", st.device_id.encode("utf-8"))
                for r in rows.tolist():
                    out[r] = fixed
            for r in np.flatnonzero((entry == e) & exc).tolist():
                code = st.exception_codes[int(u_code[r] * len(st.exception_codes))]
                out[r] = exception_frame(st.address, poll.function, code)
        return out

    def _fill(self, s: WireSlice, parts: list[dict]) -> None:
        bus = self.bus
        if not parts:
            return
        p = {k: np.concatenate([x[k] for x in parts]) for k in parts[0]}
        entry = p["entry"]
        m = len(entry)
        if not m:
            return
        bcast = self.is_bcast[entry]
        req_start = p["t_req"]
        req_end = req_start + p["req_ns"]
        resp_start = np.where(bcast, -1, req_end + p["rt_ns"])
        resp_end = np.where(bcast, -1, resp_start + p["resp_ns"])
        responses = self._responses(entry, p["exc"], p["u_code"])
        requests = [bus.requests[e] for e in entry.tolist()]
        polls = bus.sc.master.polls
        stations = np.array([pl.station for pl in polls], dtype=np.int64)[entry]
        functions = np.array([pl.function for pl in polls], dtype=np.int64)[entry]
        ids = bus.next_txn + np.arange(m)
        bus.next_txn += m
        # frames: each request, then its response (broadcasts have none), already in time order
        has_resp = ~bcast
        n_f = m + int(has_resp.sum())
        pos_req = np.arange(m) + np.concatenate(([0], np.cumsum(has_resp)[:-1]))
        pos_resp = pos_req[has_resp] + 1
        f_start = np.empty(n_f, np.int64)
        f_end = np.empty(n_f, np.int64)
        f_talker = np.empty(n_f, np.int64)
        f_station = np.empty(n_f, np.int64)
        f_kind = np.empty(n_f, np.int64)
        f_txn = np.empty(n_f, np.int64)
        f_start[pos_req], f_end[pos_req] = req_start, req_end
        f_start[pos_resp], f_end[pos_resp] = resp_start[has_resp], resp_end[has_resp]
        f_talker[pos_req] = MASTER
        f_talker[pos_resp] = stations[has_resp]
        f_station[pos_req] = -1
        f_station[pos_resp] = self.st_idx[entry][has_resp]
        f_kind[pos_req] = np.where(bcast, KIND_BROADCAST, KIND_REQUEST)
        f_kind[pos_resp] = KIND_RESPONSE
        f_txn[pos_req] = ids
        f_txn[pos_resp] = ids[has_resp]
        f_raw: list[bytes] = [b""] * n_f
        for i, r in zip(pos_req.tolist(), requests):
            f_raw[i] = r
        for i, r in zip(pos_resp.tolist(), (responses[j] for j in np.flatnonzero(has_resp).tolist())):
            f_raw[i] = r
        s.f_start, s.f_end, s.f_talker, s.f_station = f_start.tolist(), f_end.tolist(), f_talker.tolist(), \
            f_station.tolist()
        s.f_kind, s.f_txn, s.f_raw = f_kind.tolist(), f_txn.tolist(), f_raw
        s.f_gap_at = [-1] * n_f
        s.f_gap_ns = [0] * n_f
        s.f_ber = [0.0] * n_f
        s.f_noisy = [False] * n_f
        s.f_collided = [False] * n_f
        exc = p["exc"]
        s.x_id = ids.tolist()
        s.x_req_start, s.x_req_end = req_start.tolist(), req_end.tolist()
        s.x_resp_start, s.x_resp_end = resp_start.tolist(), resp_end.tolist()
        s.x_station, s.x_function = stations.tolist(), functions.tolist()
        s.x_outcome = np.where(bcast, BROADCAST, np.where(exc, EXCEPTION, OK)).tolist()
        s.x_exc = [r[2] if e else 0 for r, e in zip(responses, exc.tolist())]
        s.x_retry = [False] * m
        s.x_req_corrupt = [False] * m
        s.x_req_raw = requests
        s.x_resp_raw = responses
        s.x_responder = np.where(bcast, -1, self.st_idx[entry]).tolist()
        s.x_resp_frame = [-1] * m
        s.x_attempt = [0] * m
        s.x_retry_of = [-1] * m
        s.x_master_answer = np.where(bcast, -1, ids).tolist()
