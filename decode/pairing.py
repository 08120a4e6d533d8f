"""The transaction state machine: which response answers which request, and what became of each.

Invariants (they hold after every input):

1. At most one request is *awaiting* an answer: RTU has one master and no transaction id,
   so a new request ends the wait for the previous one (the master moved on).
2. Every request frame becomes exactly one transaction; a retry is a transaction of its own.
3. A transaction leaves the machine (is emitted) in request order, and only once its outcome
   can no longer change. A ``timeout`` may still turn ``late`` for :data:`LATE_WINDOW_NS`
   (ten response timeouts when that is longer) and at most :data:`LATE_WINDOW` requests.
4. A response is credited to a request only when station and function agree; anything else
   is an event (``unexpected_responder`` or ``orphan_response``), never a guess.
5. Frames arrive here in time order, with their direction already fixed by the port or
   inferred by :meth:`Pairing.direction_of` (two-wire bus).

Transitions (state x input -> action, next state); ``AWAIT`` means "awaiting station N":

======== ================================ ==================================================
state    input                            action -> next state
======== ================================ ==================================================
IDLE     request, station 0               emit ``broadcast`` -> IDLE
IDLE     request, station N               -> AWAIT(N)
IDLE     response                         a recent ``timeout`` matches: make it ``late``
                                          (``ok`` when timing cannot put it after the
                                          next request / within the configured timeout);
                                          else event ``orphan_response`` -> IDLE
IDLE     damage                           -> IDLE
AWAIT    request                          close the wait: ``corrupt`` if damage came,
                                          else ``timeout``; then as from IDLE
AWAIT    response from N, same function   ``ok`` / ``exception`` (``late`` past the
                                          configured timeout); ``corrupt`` plus a
                                          ``collision`` event when a damaged frame from N
                                          came first (two answers overlapped) -> IDLE
AWAIT    other response                   a recent ``timeout`` matches: make it ``late``;
                                          same function: event ``unexpected_responder``;
                                          else ``orphan_response`` -> AWAIT(N)
AWAIT    damage after the request         remember it (the answer was probably hit); shaped
                                          like the late answer of a timed-out station M:
                                          ``collision`` events for M and N -> AWAIT
end      flush                            close the wait as above, emit everything
======== ================================ ==================================================
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace

from buswitness.decode.events import Damage, Frame, Transaction
from buswitness.decode.lengths import REQUEST, RESPONSE

#: How long (and for how many later requests at most) a timed-out transaction waits for a
#: late answer before it is final: slow stations answer up to seconds late.
LATE_WINDOW_NS = 5_000_000_000
LATE_WINDOW = 64

#: Damage kinds that mean "an answer was on the line but unusable" when they follow a request.
ANSWER_DAMAGE = frozenset({"crc_error", "truncated", "collision", "stray_bytes", "line_error", "break"})

#: With no configured timeout, a frame identical to the awaited request counts as its echo
#: answer unless it comes later than this many times the slowest answer seen (plus a floor).
ECHO_SLACK = 2.0
ECHO_FLOOR_NS = 20_000_000


@dataclass
class _Slot:
    txn: Transaction
    final: bool
    age: int = 0
    request: Frame | None = None
    moved_on_hi_ns: int = 0  # latest end of the request that ended the wait
    moved_on_port: int = -1


@dataclass
class _Await:
    request: Frame
    damage: Damage | None = None
    collided: bool = False


class Pairing:
    """Pair frames into transactions; returns transactions (in request order) and events."""

    def __init__(self, response_timeout_ms: float | None, t35_ns: float, timed: bool = True) -> None:
        self.timeout_ns = None if response_timeout_ms is None else response_timeout_ms * 1e6
        self.t35_ns = t35_ns
        self.timed = timed
        self.waiting: _Await | None = None
        self.slots: list[_Slot] = []
        self.last_request: Frame | None = None
        self.last_failed = False
        self.slowest_ns = 0.0
        self._retry_flag = False

    # -- direction on a two-wire bus -------------------------------------------------------
    def direction_of(self, frame: Frame, shape: int) -> str:
        """``request`` or ``response`` for a frame whose shape the length rules left open."""
        if shape == REQUEST:
            return "request"
        if shape == RESPONSE:
            return "response"
        w = self.waiting
        if w is None:
            return "request"
        req = w.request
        if frame.address != req.address or frame.function != req.function:
            return "request"
        if frame.raw == req.raw:
            # An echo answer (FC05/06/08) and a retry of the same request look alike: the
            # master retries only after giving up, so timing tells them apart.
            gap = frame.t_start_ns - req.t_end_ns
            if self.timeout_ns is not None:
                return "response" if gap <= self.timeout_ns else "request"
            limit = max(ECHO_FLOOR_NS, ECHO_SLACK * self.slowest_ns)
            return "response" if gap <= limit else "request"
        return "response"

    # -- inputs -----------------------------------------------------------------------------
    def on_frame(self, frame: Frame) -> tuple[list[Transaction], list[Damage]]:
        events: list[Damage] = []
        if frame.direction == "request":
            self._close_wait(frame)
            self._start(frame)
        else:
            self._on_response(frame, events)
        return self._ready(), events

    def on_damage(self, damage: Damage) -> Damage:
        """Note damage while awaiting; return the event with the station it most likely concerns."""
        w = self.waiting
        # On the request's own port, stream order already says the damage came after it.
        if w is not None and damage.kind in ANSWER_DAMAGE and (damage.port == w.request.port
                                                                 or damage.t_ns >= w.request.t_end_lo_ns):
            if damage.station < 0:
                damage = replace(damage, station=w.request.address)
            if w.damage is None:
                w.damage = damage
        return damage

    def collisions(self, damage: Damage) -> list[Damage]:
        """Collision events when damage while awaiting N is shaped like a late answer from M.

        A station M whose request timed out moments ago answers late, while station N answers
        the master's next request: damaged bytes that begin with M's address and function code
        are M's late answer running into N's (M may be N itself: a late answer running into the
        answer to the master's retry). Each of the two answers gets a ``collision`` event (once
        per wait); M's transaction stays a timeout, N's becomes ``corrupt`` through the damage.
        """
        w = self.waiting
        if w is None or w.collided or len(damage.raw) < 2 or damage.kind not in ANSWER_DAMAGE:
            return []
        n_addr = w.request.address
        for slot in reversed(self.slots):
            txn = slot.txn
            if slot.final or txn.outcome != "timeout" or txn.station == 0:
                continue
            if damage.raw[0] == txn.station and damage.raw[1] & 0x7F == txn.function:
                w.collided = True
                m = txn.station
                if m == n_addr:
                    text = (f"station {m}'s late answer overlapped its own answer to the master's retry "
                            f"(two answers from one station)")
                else:
                    text = f"a late answer from station {m} overlapped the answer of station {n_addr}"
                return [Damage("collision", damage.port, damage.t_ns, damage.raw, m, text),
                        Damage("collision", damage.port, damage.t_ns, damage.raw, n_addr, text)]
        return []

    def flush(self) -> list[Transaction]:
        self._close_wait()
        for slot in self.slots:
            slot.final = True
        return self._ready()

    # -- internals --------------------------------------------------------------------------
    def _start(self, req: Frame) -> None:
        retry = (self.last_request is not None and self.last_failed and self.last_request.raw == req.raw)
        self.last_request = req
        self.last_failed = False
        window = max(LATE_WINDOW_NS, 10 * (self.timeout_ns or 0))
        for slot in self.slots:
            slot.age += 1
            if slot.age >= LATE_WINDOW or req.t_end_ns - slot.txn.t_request_end_ns > window:
                slot.final = True
        if req.address == 0:
            self.slots.append(_Slot(Transaction(0, req.function, "broadcast", req.t_end_ns, req.raw,
                                                retry=retry), True))
            return
        self.waiting = _Await(req)
        self._retry_flag = retry

    def _close_wait(self, next_request: Frame | None = None) -> None:
        w = self.waiting
        if w is None:
            return
        self.waiting = None
        req = w.request
        if w.damage is not None:
            txn = Transaction(req.address, req.function, "corrupt", req.t_end_ns, req.raw,
                              retry=self._retry_flag, response_raw=w.damage.raw)
            self.slots.append(_Slot(txn, True))
        else:
            txn = Transaction(req.address, req.function, "timeout", req.t_end_ns, req.raw, retry=self._retry_flag)
            moved_on = next_request.t_end_hi_ns if next_request is not None else 1 << 62
            port = next_request.port if next_request is not None else -1
            self.slots.append(_Slot(txn, False, request=req, moved_on_hi_ns=moved_on, moved_on_port=port))
        self.last_failed = True

    def _times(self, req: Frame, rsp: Frame) -> tuple[int, float, float, float]:
        c_rsp = rsp.wire_length * rsp.char_ns
        start = rsp.t_start_ns
        if not self.timed:
            return start, math.nan, math.nan, math.nan
        # One line, one talker at a time: an answer cannot start before the request ended.
        mid = max(0.0, (rsp.t_end_ns - c_rsp - req.t_end_ns) / 1e6)
        low = max(0.0, (rsp.t_end_lo_ns - c_rsp - req.t_end_hi_ns) / 1e6)
        high = max(0.0, (rsp.t_end_hi_ns - c_rsp - req.t_end_lo_ns) / 1e6)
        return start, mid, min(low, mid), max(high, mid)

    def _answer(self, req: Frame, rsp: Frame, retry: bool, late: bool) -> Transaction:
        start, mid, low, high = self._times(req, rsp)
        exc = rsp.function & 0x80
        if late:
            outcome = "late"
        elif exc:
            outcome = "exception"
        else:
            outcome = "ok"
        code = rsp.raw[2] if exc and len(rsp.raw) > 2 else 0
        if outcome == "exception" and code == 0:
            outcome = "ok"
        return Transaction(req.address, req.function, outcome, req.t_end_ns, req.raw, start, rsp.raw,
                           exception_code=code if outcome == "exception" else 0, retry=retry,
                           response_ms=mid, response_ms_low=low, response_ms_high=high)

    def _on_response(self, rsp: Frame, events: list[Damage]) -> None:
        w = self.waiting
        fc = rsp.function & 0x7F
        if w is not None and fc == w.request.function:
            req = w.request
            if rsp.address == req.address:
                self.waiting = None
                hit = w.damage
                if hit is not None and hit.kind in ("crc_error", "truncated") and hit.raw[:1] == rsp.raw[:1]:
                    # Two answers from "station N" to one request: they overlapped on the line, and
                    # the master heard a collision, whatever came through intact afterwards.
                    events.append(Damage("collision", rsp.port, hit.t_ns, hit.raw, rsp.address,
                                         f"two answers from station {rsp.address} to one request overlapped "
                                         f"(duplicate address?)"))
                    self.slots.append(_Slot(Transaction(req.address, req.function, "corrupt", req.t_end_ns,
                                                        req.raw, retry=self._retry_flag, response_raw=hit.raw),
                                            True))
                    self.last_failed = True
                    return
                gap = rsp.t_start_ns - req.t_end_ns
                late = self.timeout_ns is not None and gap > self.timeout_ns
                txn = self._answer(req, rsp, self._retry_flag, late)
                self.slots.append(_Slot(txn, True))
                self.last_failed = late
                if not late and not math.isnan(txn.response_ms):
                    self.slowest_ns = max(self.slowest_ns, txn.response_ms * 1e6)
                if not math.isnan(txn.response_ms_high) and txn.response_ms_high * 1e6 < self.t35_ns:
                    events.append(Damage("turnaround_short", rsp.port, txn.t_response_start_ns, rsp.raw,
                                         rsp.address, f"station {rsp.address} began its answer less than "
                                         f"t3.5 after the request ended (at most {txn.response_ms_high:.3f} ms)"))
                return
        for slot in reversed(self.slots):
            t = slot.txn
            if (not slot.final and slot.request is not None and t.outcome == "timeout"
                    and t.station == rsp.address and t.function == fc):
                if self.timeout_ns is not None:
                    late = rsp.t_start_ns - slot.request.t_end_ns > self.timeout_ns
                elif slot.moved_on_port == rsp.port:
                    late = True  # one byte stream: the answer came after the next request
                else:
                    # two ports: late only if the answer surely began after the next request ended
                    late = rsp.t_end_lo_ns - rsp.wire_length * rsp.char_ns > slot.moved_on_hi_ns
                slot.txn = self._answer(slot.request, rsp, t.retry, late)
                slot.final = True
                return
        if w is not None and fc == w.request.function:
            events.append(Damage("unexpected_responder", rsp.port, rsp.t_start_ns, rsp.raw, rsp.address,
                                 f"station {rsp.address} answered a request addressed to station "
                                 f"{w.request.address}"))
            return
        last = self.last_request
        if w is None and last is not None and last.address == rsp.address and (last.function == fc):
            detail = (f"a second answer from station {rsp.address} to one request (two stations with one "
                      f"address, or a station repeating itself)")
        else:
            detail = f"a valid answer from station {rsp.address} that no pending request asked for"
        events.append(Damage("orphan_response", rsp.port, rsp.t_start_ns, rsp.raw, rsp.address, detail))

    def _ready(self) -> list[Transaction]:
        out: list[Transaction] = []
        while self.slots and self.slots[0].final:
            out.append(self.slots.pop(0).txn)
        return out
