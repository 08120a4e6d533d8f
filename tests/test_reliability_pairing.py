"""The pairing state machine under arbitrary sequences of requests, responses and damage.

tests/test_pairing.py pins each transition on a script; here hypothesis drives any order of
inputs and the invariants in ``decode/pairing.py`` must hold after all of them.
"""

from __future__ import annotations

import itertools

from buswitness.decode.events import EVENT_KINDS, OUTCOMES, Damage, Frame, Transaction
from buswitness.decode.pairing import Pairing
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

C_NS = 573_000.0  # one 11-bit character at 19200 baud (common practice: 11 bits a character in RTU)
T35_NS = 2_005_000.0
CREDITED = ("ok", "exception", "late")
ANSWER_EVENTS = ("collision", "unexpected_responder", "orphan_response")

STATION = st.integers(0, 3)
FUNCTION = st.sampled_from([3, 4, 6])
GAP_MS = st.floats(0, 400, allow_nan=False)
STEP = st.one_of(
    st.tuples(st.just("request"), STATION, FUNCTION, GAP_MS),
    st.tuples(st.just("response"), st.integers(1, 3), FUNCTION, GAP_MS, st.integers(-1, 4)),
    st.tuples(st.just("damage"), st.sampled_from(["crc_error", "truncated", "stray_bytes", "line_error", "break",
                                                  "bytes_lost", "port_gap"]), st.integers(0, 3), GAP_MS),
)


def run(steps, timed=True):
    """Feed the steps in time order; return (requests, responses, transactions, events)."""
    pairing = Pairing(T35_NS, timed=timed)
    t, requests, responses, txns, events = 1_000_000_000, [], [], [], []
    for step in steps:
        t += int(step[3] * 1e6)
        if step[0] == "damage":
            events.append(pairing.on_damage(Damage(step[1], 0, t, bytes([step[2], 0x03, 0x55]))))
            continue
        if step[0] == "request":
            raw = bytes([step[1], step[2], 0, 1, 0, 2, 0xAA, 0xBB])
        else:
            _kind, station, fc, _gap, code = step
            raw = bytes([station, fc | 0x80, code, 0xAA, 0xBB]) if code >= 0 else \
                bytes([station, fc, 2, 0, 7, 0xAA, 0xBB])
        end = t + int(len(raw) * C_NS)
        frame = Frame(0, raw, end - 300_000, end + 300_000, C_NS, step[0])
        (requests if step[0] == "request" else responses).append(frame)
        done, evs = pairing.on_frame(frame)
        # at most one request awaits an answer, and it is the latest one
        assert pairing.waiting is None or pairing.waiting.req is requests[-1]
        txns += done
        events += evs
        t = end
    txns += pairing.flush()
    return requests, responses, txns, events


SETTINGS = settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])


@SETTINGS
@given(st.lists(STEP, max_size=40), st.booleans())
def test_every_request_becomes_exactly_one_transaction_in_request_order(steps, timed):
    requests, _responses, txns, _events = run(steps, timed)
    assert [t.request_raw for t in txns] == [r.raw for r in requests]
    assert [t.t_request_end_ns for t in txns] == [r.t_end_ns for r in requests]
    assert all(isinstance(t, Transaction) and t.outcome in OUTCOMES for t in txns)


@SETTINGS
@given(st.lists(STEP, max_size=40))
def test_every_response_is_credited_once_or_reported_never_guessed(steps):
    _requests, responses, txns, events = run(steps)
    credited = [t for t in txns if t.outcome in CREDITED]
    reported = [e for e in events if e.kind in ANSWER_EVENTS]
    assert len(responses) == len(credited) + len(reported)
    for t in credited:
        # invariant 4: a response is credited only when station and function agree
        assert t.response_raw[0] == t.station and t.response_raw[1] & 0x7F == t.function
        assert t.response_raw in [r.raw for r in responses]


@SETTINGS
@given(st.lists(STEP, max_size=40))
def test_outcomes_agree_with_what_was_on_the_line(steps):
    _requests, _responses, txns, events = run(steps)
    assert all(e.kind in EVENT_KINDS for e in events)
    for t in txns:
        if t.station == 0:
            assert t.outcome == "broadcast" and t.response_raw == b""
        if t.outcome == "timeout":
            assert t.response_raw == b"" and t.t_response_start_ns == -1
        if t.outcome == "exception":
            # MAP V1.1b3 p47: function code + 0x80, then the exception code
            assert t.response_raw[1] & 0x80 and t.exception_code == t.response_raw[2] > 0
        if t.outcome in CREDITED:
            # invariant 3: no request gets an answer that began before it ended
            assert t.t_response_start_ns >= t.t_request_end_ns - 1_000_000
    for previous, t in itertools.pairwise(txns):
        if t.retry:
            assert previous.request_raw == t.request_raw and previous.outcome in ("timeout", "late", "corrupt")
    assert not txns or not txns[0].retry

