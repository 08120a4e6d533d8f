"""Requests and answers paired per master: the FDL transaction state machine.

Only the token holder sends requests, so at most one request awaits its answer on the bus.

=================================== ===============================================================
input                               action
=================================== ===============================================================
token (SD4) from master M to N      the open request, if any, closes ``timeout``; the token is
                                    a frame, never a transaction (rotation is figured from frames)
request SDN (no answer expected),   ``broadcast``: nothing is awaited
or to address 127
request SRD/SDA/FDL status/...      the open request closes ``timeout``; this one is open; it is a
                                    ``retry`` when it repeats the last unanswered request byte for
                                    byte (same frame count bit)
answer from N to M (SA = the open   ``ok`` for a positive status (OK, data low, data high), else
request's DA, DA = its SA)          ``exception`` with the status as the result code
short acknowledgement (SC)          ``ok`` for the open request
any other answer                    ``unexpected_responder`` (a station answering for another's
                                    address) or ``orphan_response`` (nothing open)
damage while a request is open      remembered: that request closes ``corrupt`` if nothing valid
                                    answers it
flush                               the open request closes ``timeout`` (``corrupt`` after damage)
=================================== ===============================================================
"""

from __future__ import annotations

import math

from buswitness.decode.events import Damage, Frame, Transaction
from buswitness.decode.protocols.profibus_dp.fdl import BROADCAST, NO_ANSWER, POSITIVE, parse


class FdlPairing:
    def __init__(self, slot_ns: float, timed: bool = True) -> None:
        self.slot_ns = slot_ns
        self.timed = timed
        self.open: Frame | None = None
        self.open_damage: Damage | None = None
        self.last_unanswered: bytes = b""
        self._out: list[Transaction] = []

    # the core's questions ------------------------------------------------------------------------
    def is_quiet(self) -> bool:
        return self.open is None

    def direction_of(self, frame: Frame, shape: int) -> str:
        return "request" if shape == 1 else "response"

    # inputs --------------------------------------------------------------------------------------
    def on_frame(self, frame: Frame) -> tuple[list[Transaction], list[Damage]]:
        events: list[Damage] = []
        t = parse(frame.raw)
        if t is None:  # cannot happen: the scanner checked it
            return [], events
        if t.kind == "token":
            self._close_open()
        elif t.kind == "request":
            self._close_open()
            if t.function in NO_ANSWER or t.da == BROADCAST:
                self._out.append(Transaction(t.da, t.function, "broadcast", frame.t_end_ns, frame.raw))
            else:
                self.open = frame
                self.open_damage = None
        else:
            o = self.open
            req = parse(o.raw) if o is not None else None
            if req is not None and (t.kind == "ack" or (t.sa == req.da and t.da == req.sa)):
                self._answer(o, req, frame, t)
            elif req is not None and t.da == req.sa:
                events.append(Damage("unexpected_responder", frame.port, frame.t_start_ns, frame.raw, t.sa,
                                     f"station {t.sa} answered master {t.da} while station {req.da} was asked"))
            else:
                who = t.sa if t.sa >= 0 else -1
                events.append(Damage("orphan_response", frame.port, frame.t_start_ns, frame.raw, who,
                                     "an answer with no request open for it"))
        out, self._out = self._out, []
        return out, events

    def on_damage(self, damage: Damage) -> Damage:
        if self.open is not None and self.open_damage is None:
            self.open_damage = damage
            req = parse(self.open.raw)
            if req is not None and damage.station < 0:
                return Damage(damage.kind, damage.port, damage.t_ns, damage.raw, req.da, damage.detail)
        return damage

    def collisions(self, damage: Damage) -> list[Damage]:
        return []

    def flush(self) -> list[Transaction]:
        self._close_open()
        out, self._out = self._out, []
        return out

    # internals -----------------------------------------------------------------------------------
    def _close_open(self) -> None:
        o = self.open
        if o is None:
            return
        req = parse(o.raw)
        outcome = "corrupt" if self.open_damage is not None else "timeout"
        self._out.append(Transaction(req.da, req.function, outcome, o.t_end_ns, o.raw,
                                     retry=o.raw == self.last_unanswered))
        self.last_unanswered = o.raw
        self.open = None
        self.open_damage = None

    def _answer(self, o: Frame, req, rsp: Frame, t) -> None:
        retry = o.raw == self.last_unanswered
        status = 0 if t.kind == "ack" else t.function
        outcome = "ok" if status in POSITIVE else "exception"
        if self.timed:
            c = rsp.wire_length * rsp.char_ns
            low = max((rsp.t_end_lo_ns - c - o.t_end_hi_ns) / 1e6, 0.0)
            high = max((rsp.t_end_hi_ns - c - o.t_end_lo_ns) / 1e6, low)
            mid = min(max((rsp.t_end_ns - c - o.t_end_ns) / 1e6, low), high)
        else:
            mid = low = high = math.nan
        self._out.append(Transaction(req.da, req.function, outcome, o.t_end_ns, o.raw, rsp.t_start_ns, rsp.raw,
                                     exception_code=status if outcome == "exception" else 0, retry=retry,
                                     response_ms=mid, response_ms_low=low, response_ms_high=high))
        self.last_unanswered = b""
        self.open = None
        self.open_damage = None
