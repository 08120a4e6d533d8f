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


def test_answer_past_the_configured_timeout_is_late():
    txns, _ = run([(0, req(1, READ)), (150, req(1, READ_OK))], 1.0, response_timeout_ms=100)
    assert [t.outcome for t in txns] == ["late"]
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
    txns, _ = run([(0, req(3, WRITE_ONE)), (300, req(3, WRITE_ONE)), (4, req(3, WRITE_ONE))],
                  response_timeout_ms=200)
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
                        port_roles={0: "master", 1: "slaves"}, response_timeout_ms=200)
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
