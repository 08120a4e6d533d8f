"""The transaction state machine: which response answers which request, and what became of it.

The machine records facts the wire shows and nothing that depends on the master's timeout:
whether an answer came, when it began, and whether the master had already moved on to another
request by then. Classing answers against a timeout is the analysis's job (one timeout, given
or inferred, for every figure).

Invariants (they hold after every input):

1. Every request frame becomes exactly one transaction; a retry is a transaction of its own.
2. Transactions leave the machine (are emitted) in request order, and only once their outcome
   can no longer change. A request nobody answered stays *open* for a late answer for
   :data:`LATE_WINDOW_NS` (ten times the master's wait when that is longer) and at most
   :data:`LATE_WINDOW` later requests.
3. A station answers the requests it received in the order it received them: an answer from
   station N goes to N's oldest open request of the same function, and every older open
   request of N is closed unanswered. Only timing that no other reading fits moves it to N's
   newest open request (see :meth:`Pairing._owner`). No request ever gets an answer that began
   before the request ended, and no later request gets an earlier answer.
4. A response is credited to a request only when station and function agree; anything else is
   an event (``unexpected_responder`` or ``orphan_response``), never a guess.
5. Frames arrive here in time order, with their direction fixed by the port or by
   :meth:`Pairing.direction_of` (two-wire bus).

Transitions (input -> action):

=================================== ===============================================================
input                               action
=================================== ===============================================================
request to station 0                emit ``broadcast``
request to station N                the previous request, if still unanswered, now has the master
                                    moved on (its silence is a sample of the master's wait); one
                                    with answer damage closes ``corrupt``; open N's request
response from N, function F         credit N's open request of function F (invariant 3): ``ok`` /
                                    ``exception`` before the master moved on, ``late`` after it;
                                    a damaged answer from N to the same awaited request first:
                                    ``corrupt`` and a ``collision`` event (two answers overlapped)
response nobody awaits              ``unexpected_responder`` (same function as the awaited
                                    request) or ``orphan_response``
frame identical to N's open request an echo answer (FC05/06/08) or the master's retry: decided by
                                    :meth:`Pairing.direction_of` from timing and the station's
                                    record; where that is split, held until the next input decides
                                    (:meth:`Pairing._settle`); still split: the request closes
                                    ``ambiguous`` with that frame as its possible answer
damage after the awaited request    remember it on that request (its answer was probably hit);
                                    shaped like the late answer of a station M with an open
                                    request: ``collision`` events for M and N
flush                               close everything open: ``timeout`` or ``corrupt``
=================================== ===============================================================
"""

from __future__ import annotations

import bisect
import math
from collections import deque
from dataclasses import dataclass, field, replace

import numpy as np
from buswitness.decode.events import Damage, Frame, Transaction
from buswitness.decode.lengths import REQUEST, RESPONSE
from buswitness.decode.messages import RegularRun
from buswitness.decode.tables import OUTCOME_CODE

#: How long (and for how many later requests at most) an unanswered request waits for a late
#: answer before it is final: slow stations answer up to seconds late.
LATE_WINDOW_NS = 5_000_000_000
LATE_WINDOW = 64
#: Later requests the two-port columnar path lets come before the answer to an open request
#: (each ages it by two; at LATE_WINDOW it would close): past this, frame by frame.
FIFO_SPAN = 16

#: Damage kinds that mean "an answer was on the line but unusable" when they follow a request.
ANSWER_DAMAGE = frozenset({"crc_error", "truncated", "collision", "stray_bytes", "line_error", "break"})

#: The master's wait: silences after unanswered requests kept (most recent), the fewest that
#: make an estimate, and the width of the cluster of shortest ones (a master's timer plus its
#: reaction time varies by less than this: common practice, masters poll from a timer tick).
WAIT_SAMPLES = 64
WAIT_MIN_SAMPLES = 3
WAIT_CLUSTER = 1.15
#: A frame identical to the open request, this share of the master's wait or more after it, is
#: the master's retry: the master repeats a request only once it gave up on it. Below
#: ECHO_SURE of the wait the master was still waiting, so the frame is the echo answer.
RETRY_SHARE = 0.75
ECHO_SURE = 0.5
#: With the master's wait still unknown: an identical frame within ECHO_SLACK times the slowest
#: answer the station gave (or ECHO_FLOOR_NS) is its echo answer; beyond RETRY_SLACK times it,
#: a retry; in between the evidence is split.
ECHO_SLACK = 2.0
RETRY_SLACK = 4.0
ECHO_FLOOR_NS = 20_000_000
#: A station that left this many requests without any answer, and answered none, answers no
#: echo either: identical frames to it are the master's retries (a station with no device).
DEAD_AFTER = 3
#: An answer goes to the newest open request instead of the oldest only when it came more than
#: LATE_PROOF times later than the slowest answer the station gave in time, while it fits the
#: newest one like the station's usual answers (within FIT_SLACK times the slowest). A station
#: is judged by its own answers once it gave STATION_MIN_ANSWERS, before that by the bus's.
LATE_PROOF = 3.0
FIT_SLACK = 1.5
STATION_MIN_ANSWERS = 5
#: In-time answer times kept per station to know its usual range; an answer time counts as usual
#: within USUAL_LOW times its 5th and USUAL_HIGH times its 95th percentile.
RECENT_ANSWERS = 256
USUAL_LOW = 0.8
USUAL_HIGH = 1.25

_NOT_YET = 1 << 62


@dataclass
class _Open:
    """A request that may still get an answer."""

    req: Frame
    slot: _Slot
    retry: bool
    damage: Damage | None = None
    collided: bool = False
    moved_on_hi_ns: int = _NOT_YET  # latest end of the request that followed it (master moved on)
    moved_on_port: int = -1
    age: int = 0

    @property
    def moved_on(self) -> bool:
        return self.moved_on_hi_ns != _NOT_YET


@dataclass
class _Slot:
    txn: Transaction | None
    final: bool


@dataclass
class _Station:
    """What one station has shown so far: the facts the echo and FIFO decisions weigh."""

    answers: int = 0              # valid answers of any kind credited to it
    slowest_ns: float = 0.0       # slowest answer given before the master moved on
    unanswered: int = 0           # requests the master moved on from without an answer
    open: deque = field(default_factory=deque)  # its open requests, oldest first
    recent: deque = field(default_factory=lambda: deque(maxlen=RECENT_ANSWERS))  # its latest in-time answer times
    #: an answer whose owner waits for what follows: (answer, oldest candidate, newest, late for each)
    pending: tuple | None = None

    def usual_ns(self) -> tuple[float, float] | None:
        """The range of its usual answer times (5th to 95th percentile of the recent ones), once known."""
        if len(self.recent) < STATION_MIN_ANSWERS:
            return None
        lo, hi = np.percentile(np.fromiter(self.recent, float), [5, 95])
        return float(lo), float(hi)



def _response_columns(timed: bool, a_mid, a_lo, a_hi, q_mid, q_lo, q_hi) -> tuple:
    """Response times in columns (ms): midpoint, interval, contradiction and by how much, from each answer's
    start (midpoint and bounds, ns) and its request's end. As ``_times`` does one by one: a contradiction (the
    answer would have begun before its request ended) widens to [0, width] and never collapses to a point."""
    n = len(q_mid)
    if not timed:
        nan = np.full(n, np.nan)
        return nan, nan, nan, np.zeros(n, dtype=bool), nan
    mid = (a_mid - q_mid) / 1e6
    low = (a_lo - q_hi) / 1e6
    high = (a_hi - q_lo) / 1e6
    conflict = high < 0
    before = -high
    width = high - low
    low = np.where(conflict, 0.0, np.maximum(low, 0.0))
    high = np.where(conflict, width, high)
    mid = np.where(conflict, width / 2, np.minimum(np.maximum(mid, low), high))
    return mid, low, high, conflict, before


def address_groups(stations: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The distinct addresses, ascending, and each entry's place among them: what
    ``np.unique(stations, return_inverse=True)`` gives, by counting (addresses are one byte), not sorting."""
    present = np.flatnonzero(np.bincount(stations))
    place = np.zeros(present[-1] + 1 if present.size else 1, np.int64)
    place[present] = np.arange(present.size)
    return present, place[stations]


class Pairing:
    """Pair frames into transactions; returns transactions (in request order) and events."""

    def __init__(self, t35_ns: float, timed: bool = True) -> None:
        self.t35_ns = t35_ns
        self.timed = timed
        self.current: _Open | None = None  # the latest request to a station, until an answer or the next request
        self.slots: deque[_Slot] = deque()
        self.stations: dict[int, _Station] = {}
        self.last_request: Frame | None = None
        self.last_answered = True
        self.answers = 0  # valid answers credited, all stations
        self._waits: deque[float] = deque(maxlen=WAIT_SAMPLES)
        self._wait_ns: float | None = None
        self._wait_dirty = False
        self._held: Frame | None = None  # an identical frame whose class waits for what follows it
        self._events: list[Damage] = []  # events made while settling it, handed out with the next frame
        self._collided: list[Damage] = []  # collision events of the last damage, for collisions()
        self._settling: _Open | None = None  # the awaited request whose answer is held (see _owner)

    # -- what has been learnt -----------------------------------------------------------------
    def station(self, address: int) -> _Station:
        s = self.stations.get(address)
        if s is None:
            s = self.stations[address] = _Station()
        return s

    @property
    def waiting(self) -> _Open | None:
        """The request the master awaits an answer to (None after an answer or a broadcast)."""
        return self.current

    def master_wait_ns(self) -> float | None:
        """The master's wait after an unanswered request: the shortest cluster of its silences."""
        if self._wait_dirty:
            self._wait_dirty = False
            values = sorted(self._waits)
            self._wait_ns = None
            for i, v in enumerate(values):
                if bisect.bisect_right(values, v * WAIT_CLUSTER) - i >= WAIT_MIN_SAMPLES:
                    self._wait_ns = v
                    break
        return self._wait_ns

    def _slowest_ns(self, st: _Station) -> float:
        """The slowest answer to expect from ``st``: its own once it gave enough, else the bus's.

        Never below ECHO_FLOOR_NS / ECHO_SLACK, so that a capture's first answers, or a station
        that answers in a few milliseconds, do not make every later answer look impossible.
        """
        if st.answers >= STATION_MIN_ANSWERS:
            slowest = st.slowest_ns
        else:
            slowest = max((s.slowest_ns for s in self.stations.values() if s.answers >= STATION_MIN_ANSWERS),
                          default=0.0)
        return max(slowest, ECHO_FLOOR_NS / ECHO_SLACK)

    def is_quiet(self) -> bool:
        """Nothing open: the columnar path may pair a regular run on its own (see absorb_regular)."""
        return self.current is None and not self.slots and self._held is None

    # -- direction on a two-wire bus ------------------------------------------------------------
    def direction_of(self, frame: Frame, shape: int) -> str:
        """``request``, ``response`` or ``unknown`` for a frame the length rules left open.

        A frame identical to the open request of its station is that station's echo answer
        (FC05/06/08 answers repeat the request) or the master's retry. The master retries only
        once it gave up, about one wait after the request; a station answers within its usual
        times; a station that never answers anything sends no echo either; and after a damaged
        answer the master repeats its request.
        """
        if shape == REQUEST:
            return "request"
        if shape == RESPONSE:
            return "response"
        cur = self.current
        if cur is None:
            return "request"
        req = cur.req
        if frame.address != req.address or frame.function != req.function:
            return "request"
        if frame.raw != req.raw:
            return "response"
        if cur.damage is not None:
            return "request"  # its answer came, damaged: this is the master trying again
        st = self.station(req.address)
        if st.answers == 0 and st.unanswered >= DEAD_AFTER:
            return "request"
        gap = frame.t_start_ns - req.t_end_ns
        slack = (frame.t_end_hi_ns - frame.t_end_lo_ns + req.t_end_hi_ns - req.t_end_lo_ns) / 2
        wait = self.master_wait_ns()
        if wait is not None:
            if gap >= RETRY_SHARE * wait - slack:
                return "request"
            if gap <= ECHO_SURE * wait:
                return "response"
        echo_limit = ECHO_SLACK * self._slowest_ns(st)
        if gap <= echo_limit + slack:
            return "response"
        if wait is None and gap > RETRY_SLACK / ECHO_SLACK * echo_limit + slack:
            return "request"
        return "unknown"

    # -- inputs -----------------------------------------------------------------------------------
    def on_frame(self, frame: Frame) -> tuple[list[Transaction], list[Damage]]:
        events, self._events = self._events, []
        if self._held is not None:
            self._settle(frame)
            events += self._events
            self._events = []
        if frame.direction == "request":
            self._on_request(frame)
        elif frame.direction == "unknown":
            self._held = frame  # what follows it decides (see _settle)
        else:
            self._on_response(frame, events)
        return self._ready(), events

    def on_damage(self, damage: Damage) -> Damage:
        """Note damage; return the event with the station it most likely concerns.

        Damaged bytes shaped like station M's answer (its address, then the function of a
        request of M's that the master already gave up on) are M's late answer, hit: in order,
        they answer M's oldest open request, which closes (a ``timeout`` for the master, who had
        given up; the damage is its own event) so that M's next answer is not credited to it; where the master awaited
        another answer meanwhile, both answers collided (see :meth:`collisions`). Other damage
        while the master awaits an answer is that answer, probably hit.
        """
        if self._held is not None and damage.kind in ANSWER_DAMAGE:
            self._settle(None)
        self._collided = []
        if damage.kind not in ANSWER_DAMAGE:
            return damage
        w = self.current
        if len(damage.raw) >= 2:
            shaped = self.stations.get(damage.raw[0])
            if shaped is not None and shaped.pending is not None:
                self._resolve(shaped, True, self._events)  # a second (damaged) answer came
        late = self._late_owner(damage)
        if late is not None:
            self._collided = self._collision_events(damage, late)
            st = self.station(late.req.address)
            st.open.remove(late)
            while st.open and st.open[0].moved_on and st.open[0].req.t_end_ns < late.req.t_end_ns:
                self._close(st.open.popleft())
            # the master had given up on it: still a timeout for the master, now closed (in order)
            self._close(late)
            if w is not None and w is not late and w.damage is None and self._collided:
                w.damage = damage  # the awaited answer was hit by the late one
            return damage if damage.station >= 0 else replace(damage, station=late.req.address)
        # On the request's own port, stream order already says the damage came after it.
        if w is not None and (damage.port == w.req.port or damage.t_ns >= w.req.t_end_lo_ns):
            if damage.station < 0:
                damage = replace(damage, station=w.req.address)
            if w.damage is None:
                w.damage = damage
        return damage

    def _late_owner(self, damage: Damage) -> _Open | None:
        """The open request, given up on by the master, whose answer these damaged bytes are shaped like."""
        if len(damage.raw) < 2 or damage.raw[0] == 0:
            return None
        st = self.stations.get(damage.raw[0])
        if st is None:
            return None
        fc = damage.raw[1] & 0x7F
        for o in st.open:
            if o.moved_on and o.req.function == fc:
                return o
        return None

    def collisions(self, damage: Damage) -> list[Damage]:
        """The collision events the last :meth:`on_damage` found (``damage`` is that same event)."""
        events, self._collided = self._collided, []
        return events

    def _collision_events(self, damage: Damage, late: _Open) -> list[Damage]:
        """M's late answer ran into the answer the master awaited from N (M may be N: its retry's)."""
        w = self.current
        if w is None or w.collided:
            return []
        w.collided = True
        m, n_addr = late.req.address, w.req.address
        if m == n_addr:
            text = (f"station {m}'s late answer overlapped its own answer to the master's retry "
                    f"(two answers from one station)")
        else:
            text = f"a late answer from station {m} overlapped the answer of station {n_addr}"
        return [Damage("collision", damage.port, damage.t_ns, damage.raw, m, text),
                Damage("collision", damage.port, damage.t_ns, damage.raw, n_addr, text)]

    def flush(self) -> list[Transaction]:
        """End of input: every open request closes as it stands."""
        if self._held is not None:
            self._on_ambiguous(self._held)
            self._held = None
        for st in self.stations.values():
            if st.pending is not None:
                self._resolve(st, False, self._events)
            while st.open:
                self._close(st.open.popleft())
        self.current = None
        return self._ready()

    def absorb_regular(self, last_request: Frame, stations: np.ndarray, response_ns: np.ndarray,
                       last_answered: bool = True) -> None:
        """Learn from a run of request/answer pairs the columnar path paired itself.

        Called only while :meth:`is_quiet`; ``stations`` and ``response_ns`` have one entry per
        pair (NaN times on an untimed capture). The run leaves nothing open.
        """
        if stations.size:
            uniq, inverse = address_groups(stations)
            counts = np.bincount(inverse)
            slowest = np.full(uniq.size, -np.inf)
            finite = np.isfinite(response_ns)
            np.maximum.at(slowest, inverse[finite], response_ns[finite])
            order = np.argsort(inverse, kind="stable")
            bounds = np.cumsum(counts)
            for k, (a, n, s) in enumerate(zip(uniq.tolist(), counts.tolist(), slowest.tolist())):
                st = self.station(int(a))
                mine = response_ns[order[bounds[k] - min(n, RECENT_ANSWERS):bounds[k]]]
                st.recent.extend(mine[np.isfinite(mine)].tolist())
                st.answers += int(n)
                self.answers += int(n)
                if s > st.slowest_ns:
                    st.slowest_ns = float(s)
        self.last_request = last_request
        self.last_answered = last_answered

    # -- the columnar path: the same state, whole runs at a time -----------------------------------
    @staticmethod
    def regular_run(shapes: np.ndarray, addrs: np.ndarray, fcs: np.ndarray) -> int:
        """How many request/answer pairs open these frames: request-shaped to station N, then N's answer."""
        k = np.arange(0, shapes.shape[0] - 1, 2)
        if k.size == 0:
            return 0
        ok = ((shapes[k] == REQUEST) & (shapes[k + 1] == RESPONSE) & (addrs[k] == addrs[k + 1]) & (addrs[k] != 0)
              & ((fcs[k + 1] & 0x7F) == fcs[k]))
        bad = np.flatnonzero(~ok)
        return int(bad[0]) if bad.size else int(k.size)

    def pair_regular(self, rr: RegularRun) -> tuple[dict, list[Damage]]:
        """Transactions of a run of request/answer pairs (see :meth:`regular_run`), in columns.

        Called only while :meth:`is_quiet`. Each answer follows its request at once, so none is
        late and nothing stays open; gives exactly what :meth:`on_frame` gives frame by frame
        (tests/test_pairing_columns.py), and learns what the run teaches (answer counts,
        slowest answers) into this object's own state.
        """
        run, i, j, port, char_ns = rr.run, rr.i, rr.j, rr.port, rr.char_ns
        raws, lo, hi, lens, addrs, fcs, t_start, t_end = run.raws, run.lo, run.hi, run.lens, run.addrs, \
            run.fcs, rr.t_start, rr.t_end
        q = np.arange(i, j, 2)
        r = q + 1
        c_rsp = lens[r] * char_ns
        rsp_raws = raws[i + 1:j:2]
        req_raws = raws[i:j:2]
        exc = (fcs[r] & 0x80) != 0
        codes = np.zeros(q.size, dtype=np.uint8)
        if exc.any():
            codes[exc] = [rsp_raws[k][2] for k in np.flatnonzero(exc).tolist()]
        is_exc = exc & (codes != 0)
        outcome = np.where(is_exc, OUTCOME_CODE["exception"], OUTCOME_CODE["ok"]).astype(np.int8)
        mid, low, high, conflict, before = _response_columns(
            self.timed, t_end[r] - c_rsp, lo[r] - c_rsp, hi[r] - c_rsp, t_end[q], lo[q], hi[q])
        retry = np.zeros(q.size, dtype=bool)
        if not self.last_answered and self.last_request is not None:
            retry[0] = self.last_request.raw == req_raws[0]
        columns = {
            "t_request_end_ns": t_end[q], "t_response_start_ns": t_start[r], "station": addrs[q],
            "function": fcs[q], "outcome": outcome, "exception_code": np.where(is_exc, codes, 0), "retry": retry,
            "response_ms": mid, "response_ms_low": low, "response_ms_high": high,
            "request_raw": req_raws, "response_raw": rsp_raws,
        }
        found: list[tuple[int, Damage]] = []
        for k in np.flatnonzero(conflict).tolist():
            found.append((k, Damage("timing_conflict", port, int(t_start[r[k]]), rsp_raws[k], rsp_raws[k][0],
                                 f"station {rsp_raws[k][0]}'s answer would have begun {before[k]:.3f} "
                                 f"ms or more before its request ended: the character format or the adapter's "
                                 f"latency is not what the capture states (response time widened to "
                                 f"[0, {high[k]:.3f}] ms)")))
        short = np.flatnonzero(~conflict & (high * 1e6 < self.t35_ns))
        found += [(k, Damage("turnaround_short", port, int(t_start[r[k]]), rsp_raws[k], rsp_raws[k][0],
                             f"station {rsp_raws[k][0]} began its answer less than t3.5 after the request "
                             f"ended (at most {high[k]:.3f} ms)")) for k in short.tolist()]
        # in answer order, as on_frame gives them frame by frame (a pair has at most one of the two)
        events = [d for _k, d in sorted(found, key=lambda x: x[0])]
        last = int(q[-1])
        req_port = port if rr.request_port < 0 else rr.request_port
        self.absorb_regular(Frame(req_port, raws[last], int(lo[last]), int(hi[last]), char_ns, "request"),
                            addrs[q], mid * 1e6)
        return columns, events

    # -- the columnar path of a four-wire bus: requests and answers on two ports ----------------------
    def _fifo_opens(self, req_port: int) -> list[_Open] | None:
        """The open requests, oldest first, when the state is one the two-port columnar path can carry
        on from (undamaged requests, every one awaiting its answer in order, the newest one the master's); else None."""
        if self._held is not None or self._events:
            return None
        by_slot: dict[int, _Open] = {}
        for st in self.stations.values():
            if st.pending is not None:
                return None
            for o in st.open:
                by_slot[id(o.slot)] = o
        if len(by_slot) != len(self.slots):
            return None
        pre = [by_slot.get(id(slot)) for slot in self.slots]
        if any(o is None or o.slot.final or o.damage is not None or o.collided or o.req.port != req_port
               for o in pre):
            return None
        opens: list[_Open] = pre  # type: ignore[assignment]
        if opens and (self.current is not opens[-1] or opens[-1].moved_on
                      or not all(o.moved_on for o in opens[:-1])):
            return None
        if not opens and self.current is not None:
            return None
        return opens

    def pair_two_port(self, rr: RegularRun, is_req: np.ndarray) -> tuple[int, dict | None, list[Damage]]:
        """Pair frames ``rr.i`` to ``rr.j`` of a four-wire bus (requests on ``rr.request_port``, answers
        on ``rr.port``, merged in time order) in columns, as far as :meth:`on_frame` would give the same.

        With coarse timestamps the merged order puts several requests before the answer to the
        first (an answer sorts by its latest start, a request by its earliest). Each answer still
        goes to the oldest open request (invariant 3); here that is done for whole runs in which
        every answer is from the station and function of the oldest open request, each station
        has one open request at a time, and no open request ages out (:data:`FIFO_SPAN`). Requests
        still open where the run stops are left as :meth:`on_frame` would have left them, so the
        frame-by-frame path carries on from there. Returns the index the run stopped at (``rr.i``:
        nothing done), the transactions in columns (None when none finished) and the events
        (tests/test_fourwire_columns.py: equal to frame by frame).
        """
        run, i0, m, c = rr.run, rr.i, rr.j, rr.char_ns
        req_port, rsp_port = rr.request_port, rr.port
        pre = self._fifo_opens(req_port)
        if pre is None or m <= i0:
            return i0, None, []
        lo, hi, lens, addrs, fcs, raws, t_start, t_end = (run.lo, run.hi, run.lens, run.addrs, run.fcs, run.raws,
                                                          rr.t_start, rr.t_end)
        q = len(pre)
        R = i0 + np.flatnonzero(is_req[i0:m])
        A = i0 + np.flatnonzero(~is_req[i0:m])
        nq, na = q + R.size, A.size
        pre_req = [o.req for o in pre]
        qpos = np.concatenate([np.full(q, -1, np.int64), R])
        qaddr = np.concatenate([np.array([f.address for f in pre_req], np.int64), addrs[R].astype(np.int64)])
        qfc = np.concatenate([np.array([f.function for f in pre_req], np.int64), fcs[R].astype(np.int64)])
        qlo = np.concatenate([np.array([f.t_end_lo_ns for f in pre_req], np.int64), lo[R]])
        qhi = np.concatenate([np.array([f.t_end_hi_ns for f in pre_req], np.int64), hi[R]])
        qend = np.concatenate([np.array([f.t_end_ns for f in pre_req], np.int64), t_end[R]])
        age0 = np.concatenate([np.array([o.age for o in pre], np.int64), np.zeros(R.size, np.int64)])
        n = min(nq, na)
        # where each request makes the state one this path cannot follow (m: nowhere)
        ans = np.full(nq, m, np.int64)
        ans[:n] = A[:n]
        fail = np.full(nq, m, np.int64)
        a = A[:n]
        ok = ((a > qpos[:n]) & (qaddr[:n] != 0) & (addrs[a] == qaddr[:n]) & ((fcs[a] & 0x7F) == qfc[:n])
              & (qlo[:n] <= hi[a]))
        fail[:n] = np.where(ok, m, a)
        fail = np.where(qaddr == 0, np.minimum(fail, qpos), fail)  # a broadcast: frame by frame
        span = np.minimum(FIFO_SPAN, (LATE_WINDOW - 4 - age0) // 2)
        idx = np.arange(nq)
        for d in range(1, FIFO_SPAN + 2):
            j = np.minimum(idx + d, nq - 1)
            later = (idx + d < nq) & (qpos[j] < ans)  # request i + d came while request i was open
            if not later.any():
                break
            bad = later & ((d > span) | (qend[j] - qend > LATE_WINDOW_NS))
            fail = np.where(bad, np.minimum(fail, qpos[j]), fail)
            # Request i + d to the same station, same function, may be a candidate for the answer to
            # request i (_owner): the oldest still takes it when the timing rules cannot pick the
            # newest, surely so when the answer began within its own end interval's width after the
            # oldest ended (both rules need more: a usual time over zero, a slowest answer over 10 ms).
            rival = later & (ans < m) & (qaddr[j] == qaddr) & (qfc[j] == qfc)
            if rival.any():
                r = np.flatnonzero(rival)
                a_r = ans[r]
                open_rival = qlo[j[r]] <= hi[a_r]
                if self.timed:
                    open_rival &= t_start[a_r] - qend[r] > hi[a_r] - lo[a_r]
                fail[r] = np.where(open_rival, np.minimum(fail[r], a_r), fail[r])
        e = int(fail.min()) if nq else m
        if na > nq:
            e = min(e, int(A[nq]))
        if e <= i0:
            return i0, None, []
        k = int(np.searchsorted(A, e))          # answers before the stop, each to request k of the list
        r_end = q + int(np.searchsorted(R, e))  # requests before the stop
        # -- the requests: the master moved on from the one before whenever its answer had not come
        for addr in dict.fromkeys(qaddr[q:r_end].tolist()):
            self.station(addr)  # stations become known in request order, as on_frame meets them
        first_new = q
        moved_by_next = np.zeros(nq, dtype=bool)  # request i was awaited when request i + 1 came
        if r_end > 0:
            nxt = np.arange(max(first_new, 1), r_end)
            moved_by_next[nxt - 1] = ans[nxt - 1] > qpos[nxt]
        retry_new = np.zeros(nq, dtype=bool)
        if r_end > q:
            if q and ans[q - 1] < qpos[q]:
                answered = True
            else:
                answered = self.last_answered
            last = self.last_request
            retry_new[q] = last is not None and not answered and last.raw == raws[int(qpos[q])]
            # the same request again while the first still awaited its answer: only where address,
            # function and length agree are the bytes compared
            prev_, next_ = qpos[q:r_end - 1], qpos[q + 1:r_end]
            alike = (moved_by_next[q:r_end - 1] & (addrs[prev_] == addrs[next_]) & (fcs[prev_] == fcs[next_])
                     & (lens[prev_] == lens[next_]))
            for i in np.flatnonzero(alike).tolist():
                retry_new[q + i + 1] = raws[int(prev_[i])] == raws[int(next_[i])]
            if self._settling is not None:
                if not self._settling.moved_on:
                    self._settling.moved_on_hi_ns = int(qhi[q])
                    self._settling.moved_on_port = req_port
                self._settling = None
        waits = np.flatnonzero(moved_by_next[:r_end - 1])
        waits = waits[waits + 1 >= q]
        if waits.size:
            gaps = t_start[qpos[waits + 1]] - qend[waits]
            self._waits.extend(gaps.astype(np.float64).tolist())
            self._wait_dirty = True
            for addr, count in zip(*np.unique(qaddr[waits], return_counts=True)):
                self.station(int(addr)).unanswered += int(count)
        # -- the answers: each to its request, late when the master surely moved on before it began
        columns = None
        events: list[Damage] = []
        if k:
            a = A[:k]
            c_rsp = lens[a] * c
            moved = np.zeros(k, dtype=bool)
            moved_hi = np.zeros(k, np.int64)
            moved_same_port = np.zeros(k, dtype=bool)
            for i, o in enumerate(pre[:k]):
                if o.moved_on:
                    moved[i], moved_hi[i], moved_same_port[i] = True, o.moved_on_hi_ns, o.moved_on_port == rsp_port
            by_next = ~moved & moved_by_next[:k]
            moved_hi[by_next] = qhi[np.flatnonzero(by_next) + 1]
            moved_same_port[by_next] = req_port == rsp_port
            moved |= by_next
            late = moved & moved_same_port
            check = np.flatnonzero(moved & ~moved_same_port)
            if check.size:  # as _is_late; in floats only where they hold every nanosecond exactly
                lo_a, hi_m = lo[a[check]], moved_hi[check]
                if max(np.abs(lo_a).max(), np.abs(hi_m).max()) < 1 << 52:
                    late[check] = lo_a - lens[a[check]] * c > hi_m
                else:
                    late[check] = [x - n_ * c > h for x, n_, h in zip(lo_a.tolist(), lens[a[check]].tolist(),
                                                                   hi_m.tolist())]
            rsp_raws = [raws[x] for x in a.tolist()]
            req_raws = [f.raw for f in pre_req[:k]] + [raws[x] for x in qpos[q:k].tolist()]
            exc = (fcs[a] & 0x80) != 0
            codes = np.zeros(k, dtype=np.uint8)
            if exc.any():
                codes[exc] = [rsp_raws[x][2] for x in np.flatnonzero(exc).tolist()]
            is_exc = exc & (codes != 0) & ~late
            outcome = np.where(late, OUTCOME_CODE["late"],
                               np.where(is_exc, OUTCOME_CODE["exception"], OUTCOME_CODE["ok"])).astype(np.int8)
            mid, low, high, conflict, before = _response_columns(
                self.timed, t_end[a] - c_rsp, lo[a] - c_rsp, hi[a] - c_rsp, qend[:k], qlo[:k], qhi[:k])
            retry = np.concatenate([np.array([o.retry for o in pre[:k]], dtype=bool), retry_new[q:k]])
            columns = {
                "t_request_end_ns": qend[:k], "t_response_start_ns": t_start[a], "station": qaddr[:k].astype(np.uint8),
                "function": qfc[:k].astype(np.uint8), "outcome": outcome,
                "exception_code": np.where(is_exc, codes, 0).astype(np.uint8), "retry": retry,
                "response_ms": mid, "response_ms_low": low, "response_ms_high": high,
                "request_raw": req_raws, "response_raw": rsp_raws,
            }
            short = ~conflict & ~late & (high * 1e6 < self.t35_ns)
            for x in np.flatnonzero(conflict | short).tolist():
                raw = rsp_raws[x]
                if conflict[x]:
                    events.append(Damage("timing_conflict", rsp_port, int(t_start[a[x]]), raw, raw[0],
                                         f"station {raw[0]}'s answer would have begun {before[x]:.3f} ms or more "
                                         f"before its request ended: the character format or the adapter's latency "
                                         f"is not what the capture states (response time widened to "
                                         f"[0, {high[x]:.3f}] ms)"))
                else:
                    events.append(Damage("turnaround_short", rsp_port, int(t_start[a[x]]), raw, raw[0],
                                         f"station {raw[0]} began its answer less than t3.5 after the request "
                                         f"ended (at most {high[x]:.3f} ms)"))
            self._absorb_answers(qaddr[:k], np.where(late, np.nan, mid * 1e6))
            for o in pre[:k]:
                self.slots.popleft()
                self.station(o.req.address).open.popleft()
        # -- what is still open where the run stopped, as on_frame leaves it
        still: dict[int, _Open] = {}
        new_pos = qpos[q:r_end]
        for i in range(k, r_end):
            addr = int(qaddr[i])
            same = np.flatnonzero(qaddr[:i] == addr)
            before = int(same[-1]) if same.size else None  # the station's request before this one
            if i < q:
                o = pre[i]
            else:
                x = int(qpos[i])
                o = _Open(Frame(req_port, raws[x], int(lo[x]), int(hi[x]), c, "request"), _Slot(None, False),
                          bool(retry_new[i]))
                self.slots.append(o.slot)
                self.station(addr).open.append(o)
            # _age: each later request ages an open request by two while it is its station's oldest, else by one
            later_new = new_pos[new_pos > qpos[i]]
            head_from = -1 if before is None else int(ans[before])
            o.age += int(later_new.size + np.count_nonzero(later_new > head_from))
            if i < r_end - 1 and not o.moved_on:
                o.moved_on_hi_ns, o.moved_on_port = int(qhi[i + 1]), req_port
            still[i] = o
        if r_end > 0:
            last_open = r_end - 1 >= k
            if r_end > q:
                x = int(qpos[r_end - 1])
                self.current = still[r_end - 1] if last_open else None
                self.last_request = (self.current.req if self.current is not None
                                     else Frame(req_port, raws[x], int(lo[x]), int(hi[x]), c, "request"))
                self.last_answered = not last_open
            elif not last_open:
                self.current = None
                self.last_answered = True
        return e, columns, events

    def _absorb_answers(self, stations: np.ndarray, response_ns: np.ndarray) -> None:
        """Answer counts, slowest answers and recent answer times of credited answers (NaN: late or untimed)."""
        self.answers += int(stations.size)
        uniq, inverse = np.unique(stations, return_inverse=True)
        for k, addr in enumerate(uniq.tolist()):
            st = self.station(int(addr))
            mine = response_ns[inverse == k]
            st.answers += int(mine.size)
            timely = mine[np.isfinite(mine)]
            if timely.size:
                st.slowest_ns = max(st.slowest_ns, float(timely.max()))
                st.recent.extend(timely[-RECENT_ANSWERS:].tolist())

    # -- internals ----------------------------------------------------------------------------------
    def _on_request(self, req: Frame) -> None:
        prev = self.current
        held, self._settling = self._settling, None
        if held is not None and not held.moved_on:
            held.moved_on_hi_ns = req.t_end_hi_ns
            held.moved_on_port = req.port
        if prev is not None:
            prev.moved_on_hi_ns = req.t_end_hi_ns
            prev.moved_on_port = req.port
            st = self.station(prev.req.address)
            if prev.damage is not None:
                self._drop(prev)
                self._close(prev)
            else:
                st.unanswered += 1
                if prev.req.port == req.port:
                    self._waits.append(float(req.t_start_ns - prev.req.t_end_ns))
                    self._wait_dirty = True
        target = self.stations.get(req.address)
        if target is not None and target.pending is not None:
            self._resolve(target, False, self._events)  # polled again before a second answer came
        retry = (self.last_request is not None and not self.last_answered and self.last_request.raw == req.raw)
        self.last_request = req
        self.last_answered = False
        self._age(req)
        if req.address == 0:
            self.slots.append(_Slot(Transaction(0, req.function, "broadcast", req.t_end_ns, req.raw,
                                                retry=retry), True))
            self.current = None
            self.last_answered = True  # nobody answers a broadcast: a repeat of it is no retry
            return
        slot = _Slot(None, False)
        self.slots.append(slot)
        o = _Open(req, slot, retry)
        self.station(req.address).open.append(o)
        self.current = o

    def _settle(self, after: Frame | None) -> None:
        """Class the held identical frame by what followed it: ``after`` (None: damaged bytes).

        An answer is followed by the master's next request after its usual short pause; a retry
        nobody answered by silence until the master gives up again (about one wait), or by the
        answer to it. Damage right after it is the retry's answer being hit.
        """
        held, self._held = self._held, None
        assert held is not None
        cur = self.current
        if cur is None or after is None:
            self._as(held, "request")
            return
        first_gap = held.t_start_ns - cur.req.t_end_ns
        gap = after.t_start_ns - held.t_end_ns
        wait = self.master_wait_ns()
        if after.raw == held.raw or (after.direction == "response" and after.address == held.address):
            # its own answer follows: the held frame was the master's retry
            verdict = "request" if gap <= ECHO_SLACK * self._slowest_ns(self.station(held.address)) else "unknown"
        elif wait is not None:
            verdict = "request" if gap >= RETRY_SHARE * wait else "response" if gap <= ECHO_SURE * wait else "unknown"
        else:
            verdict = "request" if gap >= RETRY_SHARE * first_gap else "response" if gap <= ECHO_SURE * first_gap \
                else "unknown"
        self._as(held, verdict)

    def _as(self, frame: Frame, verdict: str) -> None:
        if verdict == "request":
            self._on_request(replace(frame, direction="request"))
        elif verdict == "response":
            self._on_response(replace(frame, direction="response"), self._events)
        else:
            self._on_ambiguous(frame)

    def _on_ambiguous(self, frame: Frame) -> None:
        """An identical frame the wire cannot class: the open request closes ``ambiguous``."""
        o = self.current
        assert o is not None
        self._drop(o)
        start, _mid, _low, _high, _conflict = self._times(o.req, frame)
        o.slot.txn = Transaction(o.req.address, o.req.function, "ambiguous", o.req.t_end_ns, o.req.raw, start,
                                 frame.raw, retry=o.retry)
        o.slot.final = True
        self.current = None
        self.last_answered = True

    def _age(self, req: Frame) -> None:
        """Close open requests that waited too long (in time or in later requests) for an answer."""
        wait = self.master_wait_ns() or 0.0
        window = max(LATE_WINDOW_NS, 10 * wait)
        for st in self.stations.values():
            while st.open:
                o = st.open[0]
                o.age += 1
                if o.age < LATE_WINDOW and req.t_end_ns - o.req.t_end_ns <= window:
                    break
                if st.pending is not None:
                    self._resolve(st, False, self._events)
                    continue
                st.open.popleft()
                self._close(o)
            for o in st.open:
                o.age += 1

    def _drop(self, o: _Open) -> None:
        st = self.station(o.req.address)
        try:
            st.open.remove(o)
        except ValueError:
            pass

    def _close(self, o: _Open) -> None:
        """No valid answer came to ``o``: ``corrupt`` when its answer was hit, else ``timeout``."""
        req = o.req
        if o.damage is not None:
            txn = Transaction(req.address, req.function, "corrupt", req.t_end_ns, req.raw, retry=o.retry,
                              response_raw=o.damage.raw)
        else:
            txn = Transaction(req.address, req.function, "timeout", req.t_end_ns, req.raw, retry=o.retry)
        o.slot.txn = txn
        o.slot.final = True
        if self.current is o:
            self.current = None

    def _times(self, req: Frame, rsp: Frame) -> tuple[int, float, float, float, float]:
        """Answer start, response time midpoint and interval in ms, and by how much (ms) the model contradicts itself.

        One line, one talker at a time: an answer cannot start before the request ended. Where
        the bounds say it did (a wrong character format, an adapter slower than stated), the
        timing model is contradicted: the interval widens to [0, its own width] instead of
        collapsing to a point, and the caller reports it.
        """
        c_rsp = rsp.wire_length * rsp.char_ns
        start = rsp.t_start_ns
        if not self.timed:
            return start, math.nan, math.nan, math.nan, 0.0
        mid = (rsp.t_end_ns - c_rsp - req.t_end_ns) / 1e6
        low = (rsp.t_end_lo_ns - c_rsp - req.t_end_hi_ns) / 1e6
        high = (rsp.t_end_hi_ns - c_rsp - req.t_end_lo_ns) / 1e6
        if high < 0:
            width = high - low
            return start, width / 2, 0.0, width, -high
        low = max(0.0, low)
        return start, min(max(mid, low), high), low, high, 0.0

    def _answer(self, o: _Open, rsp: Frame, late: bool, events: list[Damage]) -> Transaction:
        req = o.req
        start, mid, low, high, conflict = self._times(req, rsp)
        exc = rsp.function & 0x80
        code = rsp.raw[2] if exc and len(rsp.raw) > 2 else 0
        if late:
            outcome = "late"
        elif exc and code:
            outcome = "exception"
        else:
            outcome = "ok"
        if conflict:
            events.append(Damage("timing_conflict", rsp.port, start, rsp.raw, rsp.address,
                                 f"station {rsp.address}'s answer would have begun {conflict:.3f} ms or more before "
                                 f"its request ended: the character format or the adapter's latency is not what "
                                 f"the capture states (response time widened to [0, {high:.3f}] ms)"))
        elif not late and high * 1e6 < self.t35_ns:
            events.append(Damage("turnaround_short", rsp.port, start, rsp.raw, rsp.address,
                                 f"station {rsp.address} began its answer less than t3.5 after the request "
                                 f"ended (at most {high:.3f} ms)"))
        return Transaction(req.address, req.function, outcome, req.t_end_ns, req.raw, start, rsp.raw,
                           exception_code=code if outcome == "exception" else 0, retry=o.retry,
                           response_ms=mid, response_ms_low=low, response_ms_high=high)

    def _owner(self, st: _Station, rsp: Frame) -> tuple[_Open | None, _Open | None]:
        """The open request of ``st`` this answer belongs to (invariant 3), and an alternative.

        The alternative (the newest open request) is set when timing speaks for it: the answer
        came far later after the oldest than the station ever answered in time, and fits the
        newest well; or it fits the newest like this station's usual answers and the oldest only
        as an outlier. Then what follows decides (see :meth:`_resolve`). Otherwise the
        alternative is None and the first element is final.
        """
        fc = rsp.function & 0x7F
        cands = [o for o in st.open if o.req.function == fc and o.req.t_end_lo_ns <= rsp.t_end_hi_ns]
        if not cands:
            return None, None
        first = cands[0]
        if len(cands) == 1 or not self.timed:
            return first, None
        newest = cands[-1]
        usual = st.usual_ns()
        # its usual slowest (95th percentile: one freak answer does not set it), else the bus's
        slowest = max(usual[1], ECHO_FLOOR_NS / ECHO_SLACK) if usual is not None else self._slowest_ns(st)
        from_first = rsp.t_start_ns - first.req.t_end_ns
        from_newest = rsp.t_start_ns - newest.req.t_end_ns
        slack = rsp.t_end_hi_ns - rsp.t_end_lo_ns
        if (from_first > LATE_PROOF * slowest + slack
                and -slack <= from_newest <= max(FIT_SLACK * slowest, from_first / LATE_PROOF) + slack):
            return first, newest
        if usual is not None and from_newest >= -slack:
            def is_usual(t: float) -> bool:
                return USUAL_LOW * usual[0] - slack <= t <= USUAL_HIGH * usual[1] + slack
            if is_usual(from_newest) and not is_usual(from_first):
                return first, newest
        return first, None

    def _credit(self, st: _Station, o: _Open, rsp: Frame, late: bool, events: list[Damage]) -> None:
        """``rsp`` answers ``o``; every older open request of the station went unanswered (in order)."""
        while st.open and st.open[0] is not o:
            self._close(st.open.popleft())
        st.open.popleft()
        if self.current is o:
            self.current = None
            self.last_answered = True
            hit = o.damage
            if hit is not None and hit.kind in ("crc_error", "truncated") and hit.raw[:1] == rsp.raw[:1]:
                # Two answers from "station N" to one request: they overlapped on the line, and
                # the master heard a collision, whatever came through intact afterwards.
                events.append(Damage("collision", rsp.port, hit.t_ns, hit.raw, rsp.address,
                                     f"two answers from station {rsp.address} to one request overlapped "
                                     f"(duplicate address?)"))
                o.slot.txn = Transaction(o.req.address, o.req.function, "corrupt", o.req.t_end_ns, o.req.raw,
                                         retry=o.retry, response_raw=hit.raw)
                o.slot.final = True
                return
        txn = self._answer(o, rsp, late, events)
        o.slot.txn = txn
        o.slot.final = True
        st.answers += 1
        self.answers += 1
        if not late and not math.isnan(txn.response_ms):
            st.slowest_ns = max(st.slowest_ns, txn.response_ms * 1e6)
            st.recent.append(txn.response_ms * 1e6)

    @staticmethod
    def _is_late(o: _Open, rsp: Frame) -> bool:
        """Whether the master had moved on from ``o`` when ``rsp`` began."""
        if not o.moved_on:
            return False
        if o.moved_on_port == rsp.port:
            return True  # one byte stream: the answer came after the next request
        # two ports: late only if the answer surely began after the next request ended
        return rsp.t_end_lo_ns - rsp.wire_length * rsp.char_ns > o.moved_on_hi_ns

    def _resolve(self, st: _Station, in_order: bool, events: list[Damage]) -> None:
        """Settle a held answer: in order (a second answer came), else the newest request's (none came).

        A station that answers two requests answered the older first; one whose answer to the
        older request was lost answers only the newest, at its usual time.
        """
        rsp, first, newest, late_first, late_newest = st.pending
        st.pending = None
        o, late = (first, late_first) if in_order else (newest, late_newest)
        if o not in st.open:
            o, late = (newest, late_newest) if o is first else (first, late_first)
        if o not in st.open:
            events.append(Damage("orphan_response", rsp.port, rsp.t_start_ns, rsp.raw, rsp.address,
                                 f"a valid answer from station {rsp.address} that no pending request asked for"))
            return
        self._credit(st, o, rsp, late, events)

    def _on_response(self, rsp: Frame, events: list[Damage]) -> None:
        st = self.stations.get(rsp.address)
        if st is not None and st.pending is not None:
            self._resolve(st, True, events)  # a second answer came: the held one answered in order
        o, alt = self._owner(st, rsp) if st is not None else (None, None)
        if o is not None and alt is not None:
            st.pending = (rsp, o, alt, self._is_late(o, rsp), self._is_late(alt, rsp))
            if self.current is alt:
                # the master has an answer, whichever request it belongs to; it moves on from here
                self.current = None
                self.last_answered = True
                self._settling = alt
            return
        if o is not None:
            self._credit(st, o, rsp, self._is_late(o, rsp), events)
            return
        w = self.current
        fc = rsp.function & 0x7F
        if w is not None and fc == w.req.function:
            events.append(Damage("unexpected_responder", rsp.port, rsp.t_start_ns, rsp.raw, rsp.address,
                                 f"station {rsp.address} answered a request addressed to station "
                                 f"{w.req.address}"))
            return
        last = self.last_request
        if w is None and last is not None and last.address == rsp.address and last.function == fc:
            detail = (f"a second answer from station {rsp.address} to one request (two stations with one "
                      f"address, or a station repeating itself)")
        else:
            detail = f"a valid answer from station {rsp.address} that no pending request asked for"
        events.append(Damage("orphan_response", rsp.port, rsp.t_start_ns, rsp.raw, rsp.address, detail))

    def _ready(self) -> list[Transaction]:
        out: list[Transaction] = []
        slots = self.slots
        while slots and slots[0].final:
            txn = slots.popleft().txn
            assert txn is not None
            out.append(txn)
        return out
