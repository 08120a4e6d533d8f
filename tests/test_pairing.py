"""Pairing requests with responses: outcomes, retries, echoes and direction on a two-wire bus.

Outside check values carry their source inline (source: the MAP/MSL specifications,
TIMING.md or termios(3), as cited beside each).
"""

import pytest
from buswitness.decode import Damage, DecoderConfig, Transaction, append_crc
from test_decode_wire import FMT_19200, decode_records, deliver, of_type

C_NS = FMT_19200.char_time_s * 1e9
MS = 1e6


def req(station: int, pdu_hex: str) -> bytes:
    return append_crc(bytes([station]) + bytes.fromhex(pdu_hex))


# MAP V1.1b3 p15-17 (FC03) and p30-31 (FC10) examples, on stations of our own.
READ = "03006B0003"
READ_OK = "0306022B00000064"
WRITE_MULTI = "100001000204000A0102"
WRITE_MULTI_OK = "1000010002"
WRITE_ONE = "0600010003"  # MAP V1.1b3 p19: the answer is an echo


def run(script, latency_ms=16.0, **cfg):
    """``script``: list of (gap before, frame bytes); returns transactions and events."""
    frames, t = [], 1e9
    for gap_ms, raw in script:
        t += gap_ms * MS
        frames.append((t, raw))
        t += len(raw) * C_NS
    config = DecoderConfig(serial=FMT_19200, latency_ms={0: latency_ms}, **cfg)
    out = decode_records(deliver(frames, C_NS, latency_ms * MS), config)
    return of_type(out, Transaction), of_type(out, Damage)


@pytest.mark.parametrize("latency_ms", [16.0, 1.0])
def test_timeout_followed_by_next_request_is_a_timeout_then_ok(latency_ms):
    txns, _ = run([(0, req(1, READ)), (200, req(2, READ)), (4, req(2, READ_OK))], latency_ms)
    assert [(t.station, t.outcome) for t in txns] == [(1, "timeout"), (2, "ok")]
    assert txns[0].response_raw == b""


def test_late_answer_after_the_next_request_is_credited_to_its_own_request():
    txns, events = run([(0, req(1, READ)), (100, req(2, READ)), (3, req(1, READ_OK)), (3, req(2, READ_OK))])
    assert [(t.station, t.outcome) for t in txns] == [(1, "late"), (2, "ok")]
    assert not [e for e in events if e.kind == "orphan_response"]


def test_slow_answer_the_master_still_awaited_is_answered_not_late():
    # the decoder records facts, not a timeout: the master had not moved on, so this is an answer
    # (the analysis judges 150 ms against the timeout in use)
    txns, _ = run([(0, req(1, READ)), (150, req(1, READ_OK))], 1.0)
    assert [t.outcome for t in txns] == ["ok"]
    assert txns[0].response_ms == pytest.approx(150, abs=2)


def test_exception_answer_carries_its_code():
    # MAP V1.1b3 p49: 81 02 answers FC01 with ILLEGAL DATA ADDRESS
    txns, _ = run([(0, req(1, "0104A10001")), (5, req(1, "8102"))])
    assert [(t.outcome, t.exception_code) for t in txns] == [("exception", 2)]


def test_broadcast_expects_no_answer():
    txns, _ = run([(0, req(0, WRITE_ONE)), (150, req(1, READ)), (5, req(1, READ_OK))])
    assert [(t.station, t.outcome) for t in txns] == [(0, "broadcast"), (1, "ok")]


def test_reserved_addresses_are_framed_and_paired():
    txns, _ = run([(0, req(250, READ)), (5, req(250, READ_OK)), (30, req(255, READ)), (5, req(255, READ_OK))])
    assert [(t.station, t.outcome) for t in txns] == [(250, "ok"), (255, "ok")]


def test_echo_answer_to_write_single_register_is_a_response():
    txns, _ = run([(0, req(3, WRITE_ONE)), (4, req(3, WRITE_ONE)), (40, req(3, WRITE_ONE)), (4, req(3, WRITE_ONE))])
    assert [t.outcome for t in txns] == ["ok", "ok"]


def test_identical_request_long_after_is_a_retry_not_an_echo():
    txns, _ = run([(0, req(3, WRITE_ONE)), (300, req(3, WRITE_ONE)), (4, req(3, WRITE_ONE))])
    assert [(t.outcome, t.retry) for t in txns] == [("timeout", False), ("ok", True)]


def test_write_multiple_reply_shaped_like_a_read_request_is_its_answer():
    txns, _ = run([(0, req(1, WRITE_MULTI)), (5, req(1, WRITE_MULTI_OK)), (30, req(1, READ)), (5, req(1, READ_OK))])
    assert [(t.function, t.outcome) for t in txns] == [(0x10, "ok"), (0x03, "ok")]


def test_answer_from_another_station_is_flagged_not_credited():
    txns, events = run([(0, req(1, READ)), (5, req(7, READ_OK)), (200, req(2, READ))])
    assert txns[0].outcome == "timeout"
    assert [(e.kind, e.station) for e in events if e.kind == "unexpected_responder"] == [("unexpected_responder", 7)]


def test_answer_nobody_asked_for_is_an_orphan():
    _, events = run([(0, req(9, READ_OK))])
    assert [e.kind for e in events] == ["orphan_response"]


def test_damaged_answer_makes_the_transaction_corrupt():
    bad = bytearray(req(1, READ_OK))
    bad[4] ^= 0x40
    txns, events = run([(0, req(1, READ)), (5, bytes(bad)), (200, req(2, READ)), (5, req(2, READ_OK))])
    assert [(t.station, t.outcome) for t in txns] == [(1, "corrupt"), (2, "ok")]
    assert [(e.kind, e.station) for e in events] == [("crc_error", 1)]


def test_retry_after_timeout_is_marked():
    txns, _ = run([(0, req(1, READ)), (300, req(1, READ)), (5, req(1, READ_OK))])
    assert [(t.outcome, t.retry) for t in txns] == [("timeout", False), ("ok", True)]


def test_two_ports_take_direction_from_the_port():
    # four-wire bus: port 0 hears the master, port 1 the stations
    from buswitness.decode import Decoder
    dec = Decoder(DecoderConfig(serial=FMT_19200, latency_ms={0: 1.0, 1: 1.0}, port_roles={0: "master", 1: "slaves"}))
    out = []
    t = 1_000_000_000
    out += dec.feed(0, t, req(3, WRITE_ONE))
    out += dec.feed(1, t + 10_000_000, req(3, WRITE_ONE))
    out += dec.feed(0, t + 50_000_000, req(3, READ))
    out += dec.feed(1, t + 60_000_000, req(3, READ_OK))
    out += dec.flush_events()
    assert [(x.function, x.outcome) for x in of_type(out, Transaction)] == [(6, "ok"), (3, "ok")]


@pytest.mark.parametrize("latency_ms", [16.0, 1.0])
def test_four_wire_capture_with_one_adapter_per_direction_pairs_in_time_order(latency_ms):
    # port 0 hears the master, port 1 the stations; each adapter has its own packet timing
    from buswitness.capture.fileformat import Record, RecordBatch
    from buswitness.decode import Decoder
    master, stations, expected, t = [], [], [], 1e9
    for i in range(60):
        station = 1 + i % 3
        q = req(station, READ)
        master.append((t, q))
        t += len(q) * C_NS
        if i % 7 == 3:
            expected.append("timeout")
            t += 250 * MS
            continue
        t += (3 + i % 5) * MS
        a = req(station, READ_OK)
        stations.append((t, a))
        expected.append("ok")
        t += len(a) * C_NS + 20 * MS
    recs = [Record(0, ts, d) for ts, d in deliver(master, C_NS, latency_ms * MS, phase_ns=0.3 * MS)]
    recs += [Record(1, ts, d) for ts, d in deliver(stations, C_NS, latency_ms * MS, phase_ns=0.7 * MS)]
    recs.sort(key=lambda r: r.t_ns)
    cfg = DecoderConfig(serial=FMT_19200, latency_ms={0: latency_ms, 1: latency_ms},
                        port_roles={0: "master", 1: "slaves"})
    dec = Decoder(cfg)
    outs = [dec.feed_batch(RecordBatch.from_records(recs[i:i + 25])) for i in range(0, len(recs), 25)]
    outs.append(dec.flush())
    outcomes = [o for out in outs for o in out.transactions.outcome.astype(str)]
    assert outcomes == expected


def test_second_answer_to_one_request_is_named_as_such():
    txns, events = run([(0, req(4, READ)), (5, req(4, READ_OK)), (3, req(4, READ_OK))])
    assert [t.outcome for t in txns] == ["ok"]
    assert [(e.kind, e.station) for e in events] == [("orphan_response", 4)]
    assert "second answer" in events[0].detail


def garbled(frame: bytes) -> bytes:
    """The frame with its tail overwritten, as when another driver talks over it."""
    return frame[:3] + bytes(b ^ 0x5A for b in frame[3:])


def test_late_answer_running_into_the_next_stations_answer_is_a_collision_of_both():
    txns, events = run([(0, req(7, READ)), (200, req(1, READ)), (3, garbled(req(7, READ_OK)))])
    collisions = sorted(e.station for e in events if e.kind == "collision")
    assert collisions == [1, 7]
    assert [(t.station, t.outcome) for t in txns] == [(7, "timeout"), (1, "corrupt")]


def test_late_answer_running_into_the_answer_to_the_retry_is_two_answers_colliding():
    txns, events = run([(0, req(7, READ)), (200, req(7, READ)), (3, garbled(req(7, READ_OK)))])
    assert sorted(e.station for e in events if e.kind == "collision") == [7, 7]
    assert [(t.outcome, t.retry) for t in txns] == [("timeout", False), ("corrupt", True)]


def test_damage_after_a_request_with_no_timed_out_station_is_no_collision():
    _, events = run([(0, req(1, READ)), (3, garbled(req(1, READ_OK))), (200, req(2, READ))])
    assert not [e for e in events if e.kind == "collision"]


# -- issue 12: what independent stacks and real devices showed ----------------------------------
# Masters retry an identical request about one response timeout after it (common practice);
# FC05/FC06 answers repeat the request byte for byte (MAP V1.1b3 p18-19).
WRITE_COIL = "0500AC FF00".replace(" ", "")  # MAP V1.1b3 p18: write coil 173 ON, the answer is an echo


@pytest.mark.parametrize("latency_ms", [16.0, 1.0])
def test_retries_to_a_station_with_no_device_are_requests_not_its_echo_answers(latency_ms):
    script = []
    for cycle in range(12):
        script += [(30, req(1, READ)), (4, req(1, READ_OK))]
        for pdu in (READ, WRITE_ONE, WRITE_COIL):
            script += [(30, req(9, pdu)), (200, req(9, pdu))]  # request, then the master's retry
        script += [(200, req(2, READ)), (4, req(2, READ_OK))]
    txns, events = run(script, latency_ms)
    dead = [t for t in txns if t.station == 9]
    assert len(dead) == 12 * 3 * 2  # every attempt is a request of its own
    assert {t.outcome for t in dead} == {"timeout"}
    assert sum(t.retry for t in dead) == 12 * 3
    assert not [e for e in events if e.kind in ("orphan_response", "unexpected_responder")]


def test_echo_answers_of_a_live_station_stay_answers_once_the_masters_wait_is_known():
    script = []
    for _ in range(6):
        script += [(30, req(9, READ)), (200, req(2, READ)), (4, req(2, READ_OK))]  # 9 times out: the wait
    script += [(30, req(3, WRITE_ONE)), (60, req(3, WRITE_ONE))]  # a slow echo, well inside the wait
    txns, _ = run(script)
    assert [(t.station, t.outcome) for t in txns][-1] == (3, "ok")
    assert txns[-1].response_ms == pytest.approx(60, abs=17)


def test_a_slow_station_answers_in_order_so_the_first_answer_after_a_retry_is_the_first_requests():
    # request k at 0; the master gives up at 200 ms and retries (k+1); the station answers k at
    # 286 ms, then k+1; the master moves on in between. Each answer is measured from its own request.
    a = req(7, READ_OK)
    q = req(7, READ)
    c = len(q) * C_NS / MS
    script = [(30, req(1, READ)), (4, req(1, READ_OK))] * 6
    script += [(0, q), (200 - c, q), (86, a), (20, req(1, READ)), (4, req(1, READ_OK)),
               (150, a)]
    txns, events = run(script, 1.0)
    seven = [t for t in txns if t.station == 7]
    assert [(t.outcome, t.retry) for t in seven] == [("late", False), ("late", True)]
    assert seven[0].response_ms == pytest.approx(286, abs=2)
    assert not [e for e in events if e.kind in ("orphan_response", "collision")]


def test_an_answer_right_after_the_retry_of_a_prompt_station_is_the_retrys():
    # the station never got request k (noise at its end); it answers the retry in its usual 5 ms
    script = [(30, req(4, READ)), (5, req(4, READ_OK))] * 8
    script += [(30, req(4, READ)), (200, req(4, READ)), (5, req(4, READ_OK)), (20, req(1, READ))]
    txns, _ = run(script, 1.0)
    assert [(t.outcome, t.retry) for t in txns[-3:-1]] == [("timeout", False), ("ok", True)]
    assert txns[-2].response_ms == pytest.approx(5, abs=1)


@pytest.mark.parametrize("pdu", [READ, WRITE_ONE])
def test_a_damaged_answer_then_a_retry_and_a_good_answer_is_one_corrupt_attempt_and_an_answer(pdu):
    good = req(5, READ_OK if pdu == READ else pdu)
    bad = bytearray(good)
    bad[3] ^= 0x10
    script = [(30, req(5, pdu)), (5, bytes(bad)), (10, req(5, pdu)), (5, good), (20, req(1, READ)),
              (4, req(1, READ_OK))]
    txns, events = run(script, 1.0)
    assert [(t.station, t.outcome, t.retry) for t in txns] == [(5, "corrupt", False), (5, "ok", True),
                                                              (1, "ok", False)]
    assert [e.kind for e in events] == ["crc_error"]


def test_a_timing_contradiction_widens_the_interval_instead_of_collapsing_it():
    # answers that (by the stated 8E1 timing) would begin before the request ended: the capture's
    # format or latency is wrong. The interval must stay an interval and the conflict be reported.
    from buswitness.decode import Decoder
    dec = Decoder(DecoderConfig(serial=FMT_19200, latency_ms={0: 1.0}, host_delay_ms=0.0))
    q, a = req(1, READ), req(1, READ_OK)
    t = 1_000_000_000
    out = dec.feed(0, t, q) + dec.feed(0, t + 2 * int(C_NS), a) + dec.flush_events()
    (txn,) = of_type(out, Transaction)
    assert txn.response_ms_low == 0.0 and txn.response_ms_high > 0.5
    kinds = [e.kind for e in of_type(out, Damage)]
    assert "timing_conflict" in kinds and "turnaround_short" not in kinds


@pytest.mark.parametrize(("pause_ms", "outcomes"), [(3, [("ok", False), ("ok", False)]),
                                                     (32, [("timeout", False), ("timeout", True), ("ok", False)])])
def test_what_follows_an_identical_frame_decides_echo_or_retry_when_timing_alone_cannot(pause_ms, outcomes):
    # FIELD-NOTES 22: after a real answer the master polls on after its usual short pause; after a
    # retry nobody answers, it waits about as long again. 30 ms is neither clearly an echo nor a retry
    # on a bus whose answers so far took 5 ms and whose master's wait is not known yet.
    script = [(30, req(1, READ)), (5, req(1, READ_OK))] * 6
    script += [(30, req(3, WRITE_ONE)), (30, req(3, WRITE_ONE)), (pause_ms, req(2, READ)), (5, req(2, READ_OK))]
    txns, _ = run(script, 1.0)
    assert [(t.outcome, t.retry) for t in txns[6:]] == outcomes
