"""The bus itself: the master's poll loop and the stations' answers, as frames on the wire.

One Python step per transaction (the master's next move depends on the last answer), with
every random number drawn from pre-filled blocks so a step costs a few microseconds. The
step decides, for each frame, whether noise hits it (a bit error somewhere in it) and which
frames overlap in time (two talkers at once); what the sniffer then receives is worked out
at the bit level by :mod:`buswitness.simulate.line`.

Rules of the model (also in ``docs/scenario-format.md``):

- One line, one picture: noise and collisions damage a frame for every listener alike, so a
  damaged request gets no answer and a damaged answer is unusable to the master.
- A station's state (silent, inside a noise burst) is taken at the time of the request.
- The master waits ``timeout_ms`` after its request's last bit for an answer to *start*;
  an answer starting later is ``late`` and the master has moved on. A late answer stays on
  the wire and may collide with whatever the master sends next; a late answer that is
  damaged (noise, collision) leaves its transaction a ``timeout``: no valid answer at all.
  ``corrupt`` is kept for a damaged answer that started within the timeout.
- An answer with a silence inside it (``gap_rate``) is accepted by the master (tolerant
  masters are the common case); the silence is in the truth so the decoder can be checked.
- A station handles the requests it receives one at a time, in the order received (FIFO):
  it starts on a request when it has finished sending its previous answer, so an answer
  never starts before the station's earlier answer has ended, and a station never overlaps
  itself. A request that reaches a station while it is still sending is a collision.
- The master takes the first valid answer from the addressed station, with the function it
  asked for, that starts after its request and within its timeout, even when the station
  sent it for an earlier request (a late answer arriving while the master waits on its
  retry): the master cannot tell them apart. The transaction's ``outcome`` is always about
  the station's own answer to that request; ``master_answer`` says which answer the master took.
"""

from __future__ import annotations

import bisect
import math
from dataclasses import dataclass, field

import numpy as np
from buswitness.simulate.pdus import exception_frame, request_frame, response_data_length, response_frame
from buswitness.simulate.scenario import Event, Scenario, Station

MASTER = -1

# Outcome codes (index into OUTCOMES).
OUTCOMES = ("ok", "exception", "timeout", "late", "corrupt", "broadcast")
OK, EXCEPTION, TIMEOUT, LATE, CORRUPT, BROADCAST = range(6)

KIND_REQUEST, KIND_RESPONSE, KIND_BROADCAST = 0, 1, 2
FRAME_KINDS = ("request", "response", "broadcast")


class _Uniforms:
    """Uniform random numbers in [0, 1) from a seeded generator, drawn a block at a time."""

    def __init__(self, rng: np.random.Generator, block: int = 1 << 16) -> None:
        self.rng = rng
        self.block = block
        self.values: list[float] = []
        self.pos = 0

    def __call__(self) -> float:
        if self.pos >= len(self.values):
            self.values = self.rng.random(self.block).tolist()
            self.pos = 0
        v = self.values[self.pos]
        self.pos += 1
        return v


class _RandomBytes:
    """Register values for responses: slices of one seeded block of random bytes."""

    def __init__(self, rng: np.random.Generator, block: int = 1 << 18) -> None:
        self.rng = rng
        self.block = block
        self.data = b""
        self.pos = 0

    def take(self, n: int) -> bytes:
        if self.pos + n > len(self.data):
            self.data = self.rng.bytes(self.block)
            self.pos = 0
        out = self.data[self.pos:self.pos + n]
        self.pos += n
        return out


@dataclass
class WireSlice:
    """Frames and transactions of one stretch of simulated time (columns as Python lists)."""

    t_begin_ns: int
    t_end_ns: int
    # frames
    f_start: list[int] = field(default_factory=list)
    f_end: list[int] = field(default_factory=list)
    f_talker: list[int] = field(default_factory=list)     # MASTER or station address
    f_station: list[int] = field(default_factory=list)    # index into scenario.stations, -1 for the master
    f_kind: list[int] = field(default_factory=list)
    f_raw: list[bytes] = field(default_factory=list)
    f_gap_at: list[int] = field(default_factory=list)     # byte index after which a silence falls, -1 none
    f_gap_ns: list[int] = field(default_factory=list)
    f_ber: list[float] = field(default_factory=list)      # bit-error rate applied when noisy
    f_noisy: list[bool] = field(default_factory=list)
    f_collided: list[bool] = field(default_factory=list)
    f_txn: list[int] = field(default_factory=list)
    # transactions
    x_id: list[int] = field(default_factory=list)
    x_req_start: list[int] = field(default_factory=list)
    x_req_end: list[int] = field(default_factory=list)
    x_resp_start: list[int] = field(default_factory=list)
    x_resp_end: list[int] = field(default_factory=list)
    x_station: list[int] = field(default_factory=list)
    x_function: list[int] = field(default_factory=list)
    x_outcome: list[int] = field(default_factory=list)
    x_exc: list[int] = field(default_factory=list)
    x_retry: list[bool] = field(default_factory=list)
    x_req_corrupt: list[bool] = field(default_factory=list)
    x_req_raw: list[bytes] = field(default_factory=list)
    x_resp_raw: list[bytes] = field(default_factory=list)
    x_responder: list[int] = field(default_factory=list)  # station index of the answer counted, -1 none
    x_resp_frame: list[int] = field(default_factory=list)  # frame index (in this slice) of that answer
    x_attempt: list[int] = field(default_factory=list)     # 0 for a first request, n for its n-th retry
    x_retry_of: list[int] = field(default_factory=list)    # transaction id of the first attempt, -1 for a first
    x_master_answer: list[int] = field(default_factory=list)  # transaction id of the answer the master took, -1

    def __len__(self) -> int:
        return len(self.f_start)


def expand_windows(sc: Scenario, kind: str, duration_s: float, t0_ns: int) -> list[tuple[int, int, Event]]:
    """The (start_ns, end_ns, event) windows of one event kind inside the run, repeats expanded."""
    out: list[tuple[int, int, Event]] = []
    for ev in sc.events:
        if ev.kind != kind:
            continue
        start = ev.start_s
        while start < duration_s:
            out.append((t0_ns + int(start * 1e9), t0_ns + int(min(start + ev.duration_s, duration_s) * 1e9), ev))
            if not ev.repeat_every_s:
                break
            start += ev.repeat_every_s
    out.sort(key=lambda w: w[0])
    return out


class Bus:
    """The master and stations of a scenario, stepped one transaction at a time."""

    def __init__(self, sc: Scenario, rng: np.random.Generator, t0_ns: int, duration_s: float) -> None:
        self.sc = sc
        self.u = _Uniforms(rng)
        self.values = _RandomBytes(rng)
        self.c_ns = sc.serial.char_time_s * 1e9
        self.bits_per_char = sc.serial.bits_per_char
        self.half_bit_ns = 0.5e9 / sc.serial.baud
        self.t0_ns = t0_ns
        self.t_stop_ns = t0_ns + int(duration_s * 1e9)
        m = sc.master
        self.timeout_ns = int(m.timeout_ms * 1e6)
        self.delay_ns = int(m.inter_poll_delay_ms * 1e6)
        self.period_ns = int(m.cycle_period_ms * 1e6)
        self.bcast_delay_ns = int(m.broadcast_delay_ms * 1e6)
        self.polls = m.polls
        self.requests = [request_frame(p) for p in m.polls]
        self.by_address: dict[int, list[int]] = {}
        for i, st in enumerate(sc.stations):
            if not st.absent:
                self.by_address.setdefault(st.address, []).append(i)
        self.ber = [sc.station_ber(st) for st in sc.stations]
        self.silent: dict[int, list[tuple[int, int]]] = {}
        for a, b, ev in expand_windows(sc, "silent", duration_s, t0_ns):
            self.silent.setdefault(int(ev.station or 0), []).append((a, b))
        self.bursts = [(a, b, ev.bit_error_rate) for a, b, ev in
                       expand_windows(sc, "noise_burst", duration_s, t0_ns)]
        self.burst_starts = [w[0] for w in self.bursts]
        # master state
        self.t = t0_ns + int(0.010e9)  # the first request 10 ms into the capture
        self.cycle = 0
        self.cycle_start = self.t
        self.poll_pos = -1
        self.attempt = 0
        self.first_attempt = -1
        self.next_txn = 0
        # end of each station's latest answer frame: it starts on its next request only after that (FIFO)
        self.busy_until = [0] * len(sc.stations)
        self._advance_poll()
        self.inflight: list[int] = []  # frame indices (current slice) that may still overlap new frames
        self.slice: WireSlice | None = None

    # -- schedule ----------------------------------------------------------------------------
    def _advance_poll(self) -> None:
        """Move to the next poll entry due in the current cycle, starting new cycles as needed."""
        n = len(self.polls)
        while True:
            self.poll_pos += 1
            if self.poll_pos >= n:
                self.poll_pos = 0
                self.cycle += 1
                self.t = max(self.t, self.cycle_start + self.period_ns)
                self.cycle_start = self.t
            if self.cycle % self.polls[self.poll_pos].every_cycles == 0:
                return

    def _burst_ber(self, t: int) -> float:
        i = bisect.bisect_right(self.burst_starts, t) - 1
        if i >= 0 and t < self.bursts[i][1]:
            return self.bursts[i][2]
        return 0.0

    def _is_silent(self, address: int, t: int) -> bool:
        for a, b in self.silent.get(address, ()):
            if a <= t < b:
                return True
        return False

    def _noisy(self, n_bytes: int, ber: float) -> bool:
        if ber <= 0.0:
            return False
        p_any = -math.expm1(n_bytes * self.bits_per_char * math.log1p(-ber))
        return self.u() < p_any

    # -- frames ------------------------------------------------------------------------------
    def _add_frame(self, start: int, raw: bytes, talker: int, station: int, kind: int, txn: int, ber: float,
                   gap_at: int = -1, gap_ns: int = 0) -> int:
        s = self.slice
        assert s is not None
        end = start + round(len(raw) * self.c_ns) + gap_ns
        idx = len(s.f_start)
        s.f_start.append(start)
        s.f_end.append(end)
        s.f_talker.append(talker)
        s.f_station.append(station)
        s.f_kind.append(kind)
        s.f_raw.append(raw)
        s.f_gap_at.append(gap_at)
        s.f_gap_ns.append(gap_ns)
        s.f_ber.append(ber)
        s.f_noisy.append(self._noisy(len(raw), ber))
        s.f_collided.append(False)
        s.f_txn.append(txn)
        for j in self.inflight:
            # overlapping by under half a bit only touches a stop bit: both frames still read correctly
            if min(end, s.f_end[j]) - max(start, s.f_start[j]) > self.half_bit_ns:
                s.f_collided[j] = True
                s.f_collided[idx] = True
                self._damage_late(j)
        self.inflight.append(idx)
        return idx

    def _damage_late(self, frame: int) -> None:
        """An answer overlapped by a frame sent after its transaction was settled.

        A late answer then leaves its transaction no valid answer at all (a timeout); an
        answer that started within the timeout, after the master had already taken an
        earlier answer and moved on, is a damaged answer in time (corrupt).
        """
        s = self.slice
        assert s is not None
        txn = s.f_txn[frame]
        if s.f_kind[frame] != KIND_RESPONSE:
            return
        row = txn - s.x_id[0] if s.x_id else -1
        if 0 <= row < len(s.x_outcome) and s.x_resp_frame[row] == frame:
            if s.x_outcome[row] == LATE:
                s.x_outcome[row] = TIMEOUT
            elif s.x_outcome[row] in (OK, EXCEPTION):
                s.x_outcome[row] = CORRUPT
                s.x_exc[row] = 0

    def _prune(self) -> None:
        s = self.slice
        assert s is not None
        t = self.t
        self.inflight = [j for j in self.inflight if s.f_end[j] > t]

    # -- one transaction ---------------------------------------------------------------------
    def step(self) -> None:
        """Send the next request, let the stations answer, and move the master on."""
        s = self.slice
        assert s is not None
        self._prune()
        poll = self.polls[self.poll_pos]
        raw = self.requests[self.poll_pos]
        retry = self.attempt > 0
        txn = self.next_txn
        self.next_txn += 1
        if not retry:
            self.first_attempt = txn
        t_req = self.t
        burst = self._burst_ber(t_req)
        addressed = self.by_address.get(poll.station, [])
        req_ber = max([burst] + [self.ber[i] for i in addressed if self.sc.stations[i].noise_on == "both"])
        kind = KIND_BROADCAST if poll.station == 0 else KIND_REQUEST
        fi = self._add_frame(t_req, raw, MASTER, -1, kind, txn, req_ber)
        req_end = s.f_end[fi]
        req_bad = s.f_noisy[fi] or s.f_collided[fi]
        s.x_id.append(txn)
        s.x_req_start.append(t_req)
        s.x_req_end.append(req_end)
        s.x_station.append(poll.station)
        s.x_function.append(poll.function)
        s.x_retry.append(retry)
        s.x_attempt.append(self.attempt)
        s.x_retry_of.append(self.first_attempt if retry else -1)
        s.x_req_corrupt.append(req_bad)
        s.x_req_raw.append(raw)
        outcome, exc_code, resp_frame, responder = TIMEOUT, 0, -1, -1
        master_ok, master_answer = False, -1
        if poll.station == 0:
            outcome = BROADCAST
            self.t = req_end + self.bcast_delay_ns
        else:
            answers: list[tuple[int, int, int]] = []  # (start, frame index, station index)
            if not req_bad:
                for si in addressed:
                    st = self.sc.stations[si]
                    if self._is_silent(st.address, t_req):
                        continue
                    answers.append(self._answer(si, st, poll, raw, req_end, txn, burst))
            answers.sort()
            deadline = req_end + self.timeout_ns
            self.t = deadline
            if answers:
                start, fidx, si = answers[0]
                resp_frame, responder = fidx, si
                if start <= deadline:
                    if s.f_noisy[fidx] or s.f_collided[fidx]:
                        outcome = CORRUPT
                    else:
                        fc = s.f_raw[fidx][1]
                        outcome = EXCEPTION if fc & 0x80 else OK
                        exc_code = s.f_raw[fidx][2] if fc & 0x80 else 0
                else:
                    outcome = TIMEOUT if (s.f_noisy[fidx] or s.f_collided[fidx]) else LATE
            earlier = self._earlier_answer(poll.station, poll.function, txn, req_end, deadline)
            if earlier >= 0 and (not answers or s.f_start[earlier] < answers[0][0]):
                # the station's late answer to an earlier request, taken by the master as this one's
                master_ok, master_answer = True, s.f_txn[earlier]
                self.t = s.f_end[earlier]
            elif outcome in (OK, EXCEPTION):
                master_ok, master_answer = True, txn
                self.t = s.f_end[resp_frame]
            elif outcome == CORRUPT:
                self.t = max(s.f_end[j] for j in self.inflight if s.f_collided[j] or j == resp_frame)
            self.t += self.delay_ns
        s.x_outcome.append(outcome)
        s.x_exc.append(exc_code)
        s.x_responder.append(responder)
        s.x_resp_frame.append(resp_frame)
        s.x_resp_start.append(s.f_start[resp_frame] if resp_frame >= 0 else -1)
        s.x_resp_end.append(s.f_end[resp_frame] if resp_frame >= 0 else -1)
        s.x_resp_raw.append(s.f_raw[resp_frame] if resp_frame >= 0 else b"")
        s.x_master_answer.append(master_answer)
        if poll.station != 0 and not master_ok and self.attempt < self.sc.master.retries:
            self.attempt += 1
        else:
            self.attempt = 0
            self._advance_poll()

    def _earlier_answer(self, address: int, function: int, txn: int, req_end: int, deadline: int) -> int:
        """A valid answer already on its way from ``address`` for an earlier request, starting in this window."""
        s = self.slice
        assert s is not None
        best = -1
        for j in self.inflight:
            raw = s.f_raw[j]
            if (s.f_kind[j] == KIND_RESPONSE and s.f_txn[j] < txn and raw[0] == address
                    and raw[1] & 0x7F == function and req_end < s.f_start[j] <= deadline
                    and not s.f_noisy[j] and not s.f_collided[j]
                    and (best < 0 or s.f_start[j] < s.f_start[best])):
                best = j
        return best

    def _answer(self, si: int, st: Station, poll, request: bytes, req_end: int, txn: int,
                burst: float) -> tuple[int, int, int]:
        u = self.u
        r = st.response
        rt_ms = r.fixed_ms + r.jitter_ms * u()
        if r.tail_rate and u() < r.tail_rate:
            rt_ms += -math.log(1.0 - u()) * r.tail_mean_ms
        if st.exception_rate and u() < st.exception_rate:
            code = st.exception_codes[int(u() * len(st.exception_codes))]
            raw = exception_frame(st.address, poll.function, code)
        else:
            raw = response_frame(st.address, poll, request, self.values.take(response_data_length(poll)),
                                 st.device_id.encode("utf-8"))
        gap_at, gap_ns = -1, 0
        if st.gap_rate and u() < st.gap_rate and len(raw) > 2:
            gap_at = 1 + int(u() * (len(raw) - 2))
            gap_ns = int(st.gap_chars * self.c_ns)
        # FIFO: the station starts on this request once it has finished sending its previous answer
        start = max(req_end, self.busy_until[si]) + int(rt_ms * 1e6)
        fidx = self._add_frame(start, raw, st.address, si, KIND_RESPONSE, txn, max(self.ber[si], burst),
                               gap_at, gap_ns)
        self.busy_until[si] = self.slice.f_end[fidx] if self.slice is not None else start
        return start, fidx, si

    # -- slices ------------------------------------------------------------------------------
    def run_slice(self, t_until_ns: int) -> WireSlice:
        """Step until the master's clock passes ``t_until_ns`` (and no late answer is still on the wire)."""
        s = WireSlice(t_begin_ns=self.t, t_end_ns=t_until_ns)
        self.slice = s
        self.inflight = []
        stop = min(t_until_ns, self.t_stop_ns)
        while self.t < self.t_stop_ns:
            if self.t >= stop:
                self._prune()
                if not self.inflight:
                    break
            self.step()
        s.t_end_ns = min(self.t, self.t_stop_ns)
        if s.f_end:
            s.t_end_ns = max(s.t_end_ns, max(s.f_end))
        self.slice = None
        return s

    @property
    def finished(self) -> bool:
        return self.t >= self.t_stop_ns
