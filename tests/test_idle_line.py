"""A line nobody holds idle: the byte each driver leaves behind its frame is never part of the frame.

Without fail-safe bias the receivers see the line float when a driver switches off and read one
byte right behind the frame, usually with a framing error: 0x00 after the master, 0xFE after a
station, 0xFF too (FIELD-NOTES 21). CRC-16/MODBUS has residue zero, so "frame + 00" still checks.

Frames here are built with an independent encoder: crcmod's predefined "modbus" CRC (the
CRC-16/MODBUS of MSL V1.02 §2.5.1.2 and appendix B), never the decoder's own CRC code. Field
layouts are those of MAP V1.1b3 §6.3 (FC03) and §6.6 (FC06). The PARMRK escapes are those of
termios(3): ``FF 00 X`` for a byte X with a parity or framing error, ``FF FF`` for a data 0xFF.

Source: frames from crcmod's predefined "modbus" CRC and MAP V1.1b3 §6.3/§6.6 layouts, PARMRK escapes from termios(3), as named above; idle byte values 0x00/0xFE/0xFF are common practice.
"""

from __future__ import annotations

import math
import random
from collections import Counter

import crcmod.predefined
import pytest
from buswitness.analysis.findings import evaluate
from buswitness.analysis.pipeline import analyze_tables
from buswitness.capture.fileformat import (
    FLAG_BREAK,
    FLAG_LINE_ERROR,
    CaptureHeader,
    PortInfo,
    Record,
    RecordBatch,
)
from buswitness.capture.parmrk import ParmrkParser
from buswitness.decode import (
    Damage,
    DecodeOutput,
    Decoder,
    DecoderConfig,
    Frame,
    SerialFormat,
    Transaction,
    split_frames,
)
from buswitness.decode.lengths import REQUEST, RESPONSE, answer_length, candidate_lengths
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

# crcmod's predefined "modbus": poly 0x18005, init 0xFFFF, reflected, no final XOR (crcmod docs).
_CRC = crcmod.predefined.mkPredefinedCrcFun("modbus")
FMT = SerialFormat(19200, 8, "E", 1)  # the Modbus RTU default format (MSL V1.02 §2.5.1 p12)
CHAR_NS = FMT.char_time_s * 1e9
T0 = 7_000_000_000_000
MASTER_IDLE, STATION_IDLE = 0x00, 0xFE  # FIELD-NOTES 21: typical values after each talker


def rtu(body: bytes) -> bytes:
    """An RTU frame: address, PDU, CRC low byte first (MSL V1.02 §2.5.1.2)."""
    crc = _CRC(body)
    return body + bytes((crc & 0xFF, crc >> 8))


def read_holding(station: int, start: int, count: int) -> bytes:
    # FC03 request: address, 03, start (2), quantity (2) (MAP V1.1b3 §6.3)
    return rtu(bytes((station, 3, start >> 8, start & 0xFF, count >> 8, count & 0xFF)))


def read_holding_answer(station: int, values: list[int]) -> bytes:
    # FC03 response: address, 03, byte count, values big-endian (MAP V1.1b3 §6.3)
    data = b"".join(v.to_bytes(2, "big") for v in values)
    return rtu(bytes((station, 3, len(data))) + data)


def write_single(station: int, register: int, value: int) -> bytes:
    # FC06 request; its normal response repeats it byte for byte (MAP V1.1b3 §6.6)
    return rtu(bytes((station, 6, register >> 8, register & 0xFF, value >> 8, value & 0xFF)))


def poll_cycle() -> list[tuple[bytes, bytes]]:
    """44 polls on four stations, FC03 and FC06: (request, answer) pairs.

    Chosen so the idle byte makes a longer CRC-valid frame under another rule: FC03 requests
    with start register 0x04xx (read as an answer, byte count 4 gives 5 + 4 = 9 = 8 + 1 bytes)
    and one-register FC03 answers (7 bytes; the request rule gives 8 = 7 + 1).
    """
    polls = []
    for i in range(44):
        station = (1, 2, 3, 17)[i % 4]
        if i % 3 == 2:
            req = write_single(station, 0x0010 + i, 100 * i)
            polls.append((req, req))
            continue
        start = 0x0400 + i if i % 2 else 0x0100 + i
        count = 1 if i % 4 == 0 else 2
        polls.append((read_holding(station, start, count),
                      read_holding_answer(station, [i * 7 + k for k in range(count)])))
    return polls


def wire(polls, cycles: int = 1, idle=(MASTER_IDLE, STATION_IDLE)) -> list[tuple[float, bytes, bool]]:
    """Bytes on the wire as (end time ns, byte, marked): each frame, then its driver's idle byte.

    Answers start 6 ms after the request, the next poll 20 ms after the answer; the idle byte
    ends one character after the frame (the line floats as soon as the driver lets go).
    """
    out: list[tuple[float, bytes, bool]] = []
    t = T0 + 1e6
    for _ in range(cycles):
        for k, (req, rsp) in enumerate(polls):
            for raw, gap, who in ((req, 6e6, 0), (rsp, 20e6, 1)):
                for b in raw:
                    t += CHAR_NS
                    out.append((t, bytes((b,)), False))
                value = idle[who] if not isinstance(idle[who], tuple) else idle[who][k % len(idle[who])]
                out.append((t + CHAR_NS, bytes((value,)), True))
                t += CHAR_NS + gap
    return out


def escaped(byte: bytes, marked: bool) -> bytes:
    """What a PARMRK port hands over for one byte (termios(3))."""
    if marked:
        return b"\xff\x00" + byte
    return b"\xff\xff" if byte == b"\xff" else byte


def reads_to_records(reads: list[tuple[int, bytes]], parmrk: bool) -> list[Record]:
    """Records as the recorder writes them: each read through the PARMRK parser, segments sharing its time."""
    parser = ParmrkParser()
    records = []
    for t, chunk in reads:
        segments = parser.feed(chunk) if parmrk else [(chunk, 0)]
        records += [Record(0, t, data, flags) for data, flags in segments]
    return records


def chunk_reads(line: list[tuple[float, bytes, bool]], cuts: list[int], marks: bool) -> list[tuple[int, bytes]]:
    """The escaped stream cut into reads at ``cuts`` (byte indices); a read returns 0.2 ms after its last byte."""
    reads, pending, t_last = [], bytearray(), 0.0
    points = set(cuts)
    for i, (t, b, marked) in enumerate(line):
        pending += escaped(b, marked and marks) if marks else b
        t_last = t
        if i + 1 in points or i + 1 == len(line):
            reads.append((int(t_last + 200_000), bytes(pending)))
            pending = bytearray()
    return reads


def adapter_reads(line, latency_ms: float, marks: bool, phase_ns: float = 0.0, packet: int = 62,
                  rng: random.Random | None = None) -> list[tuple[int, bytes]]:
    """Reads as a USB adapter hands the bytes over (TIMING.md): a packet when its latency timer
    expires or its buffer fills, the read returning 0.2 ms later; the tty layer escapes marked
    bytes. With ``rng``, some reads come back in two parts at the same time (a short read()),
    which may cut a PARMRK escape in two."""
    latency = latency_ms * 1e6
    reads: list[tuple[int, bytes]] = []
    pending = bytearray()
    count = 0
    tick = phase_ns + latency + T0

    def flush(t: float) -> None:
        nonlocal pending, count
        data = bytes(pending)
        if rng is not None and len(data) > 1 and rng.random() < 0.4:
            cut = rng.randrange(1, len(data))
            reads.extend([(int(t), data[:cut]), (int(t), data[cut:])])
        else:
            reads.append((int(t), data))
        pending, count = bytearray(), 0

    for t, b, marked in line:
        if t > tick:
            if pending:
                flush(tick + 200_000)
                tick += latency
            if t > tick:
                tick += math.ceil((t - tick) / latency) * latency
        pending += escaped(b, marked) if marks else b
        count += 1
        if count == packet:
            flush(t + 200_000)
            tick = t + latency
    if pending:
        flush(tick + 200_000)
    return reads


def decode(records: list[Record], untimed: bool = False, latency_ms: float = 1.0) -> list:
    dec = Decoder(DecoderConfig(serial=FMT, latency_ms={0: latency_ms}, untimed=untimed))
    out: list = []
    for r in records:
        out += dec.feed(r.port, r.t_ns, r.data, r.flags)
    return out + dec.flush_events()


def frames(out) -> list[bytes]:
    return [x.raw for x in out if isinstance(x, Frame)]


def kinds(out) -> Counter:
    return Counter(x.kind for x in out if isinstance(x, Damage))


POLLS = poll_cycle()
EXPECTED = [raw for pair in POLLS for raw in pair]


def test_the_cycle_holds_the_lengths_that_residue_zero_confuses():
    # the cases the brief names: a rule allows n + 1 for a frame followed by 0x00
    longer = [req for req, _ in POLLS if (9, RESPONSE) in candidate_lengths(req, 0, len(req))]
    shorter = [rsp for _, rsp in POLLS if len(rsp) == 7 and (8, REQUEST) in candidate_lengths(rsp, 0, len(rsp))]
    assert len(longer) >= 10 and len(shorter) >= 5
    for raw in longer + shorter:
        assert _CRC(raw + b"\x00") == 0  # frame + 00 checks too (residue zero)


def _check_cycle(out, marked: bool) -> None:
    assert frames(out) == EXPECTED
    txs = [x for x in out if isinstance(x, Transaction)]
    assert [t.outcome for t in txs] == ["ok"] * 44
    assert [t.request_raw for t in txs] == [req for req, _ in POLLS]
    assert [t.response_raw for t in txs] == [rsp for _, rsp in POLLS]
    ev = kinds(out)
    assert ev == Counter({"idle_line_byte": 88}), ev  # no orphan, collision, stray or line_error events
    idle = [x for x in out if isinstance(x, Damage)]
    after_master = [x for x in idle if x.station == -1]
    assert len(after_master) == 44 and {x.raw for x in after_master} == {b"\x00"}
    assert Counter(x.station for x in idle if x.station >= 0) == Counter({1: 11, 2: 11, 3: 11, 17: 11})
    assert {x.raw for x in idle if x.station >= 0} == {b"\xfe"}
    assert all(("marked bad" in x.detail) == marked for x in idle)


@pytest.mark.parametrize("marked", [True, False], ids=["marked", "unmarked"])
def test_every_poll_answered_through_a_16_ms_adapter(marked):
    line = wire(POLLS)
    records = reads_to_records(adapter_reads(line, 16.0, marked), parmrk=marked)
    if marked:
        # termios(3) PARMRK: a marked byte X reads "FF 00 X"; for X = 0x00 that is "FF 00 00", the
        # very escape of a break, so the parser gives an empty break record. The marked 0xFE is a
        # record of its own with the line-error flag, at the read's time.
        flagged = Counter((r.flags, r.data) for r in records if r.flags)
        assert flagged == Counter({(FLAG_BREAK, b""): 44, (FLAG_LINE_ERROR, b"\xfe"): 44})
    _check_cycle(decode(records, latency_ms=16.0), marked)


@pytest.mark.parametrize("marked", [True, False], ids=["marked", "unmarked"])
def test_every_poll_answered_byte_by_byte(marked):
    line = wire(POLLS)
    records = reads_to_records(chunk_reads(line, list(range(len(line) + 1)), marked), parmrk=marked)
    _check_cycle(decode(records), marked)


@pytest.mark.parametrize("marked", [True, False], ids=["marked", "unmarked"])
def test_every_poll_answered_fed_whole(marked):
    # one read holding the whole capture: no timing at all, only bytes, marks and length rules
    line = wire(POLLS)
    records = reads_to_records(chunk_reads(line, [], marked), parmrk=marked)
    _check_cycle(decode(records, untimed=True), marked)


@pytest.mark.parametrize("seed", range(8))
@pytest.mark.parametrize("marked", [True, False], ids=["marked", "unmarked"])
def test_every_poll_answered_in_random_chunkings(marked, seed):
    # adapters of several latency timers, timer phases and packet sizes
    rng = random.Random(seed)
    line = wire(POLLS)
    latency = rng.choice([1.0, 2.0, 4.0, 8.0, 16.0])
    reads = adapter_reads(line, latency, marked, phase_ns=rng.uniform(0, latency * 1e6),
                          packet=rng.choice([6, 9, 16, 62]))
    _check_cycle(decode(reads_to_records(reads, parmrk=marked), latency_ms=latency), marked)


@pytest.mark.parametrize("seed", range(8))
@pytest.mark.parametrize("marked", [True, False], ids=["marked", "unmarked"])
def test_short_reads_cutting_escapes_give_the_same_frames_and_pairs(marked, seed):
    # Short reads: one packet comes back in two read()s with the same time, which may cut a
    # PARMRK escape (FF | 00 X); the parser carries it to the next read. The byte-time model
    # takes such records as separate packets, which can narrow an interval into a false
    # "turnaround_short" or cross it into a "timing_conflict" (a timing matter outside this
    # test): frames, pairs and idle-line events are what is pinned here.
    rng = random.Random(seed)
    line = wire(POLLS)
    latency = rng.choice([1.0, 2.0, 4.0, 8.0, 16.0])
    reads = adapter_reads(line, latency, marked, phase_ns=rng.uniform(0, latency * 1e6),
                          packet=rng.choice([6, 9, 16, 62]), rng=rng)
    out = decode(reads_to_records(reads, parmrk=marked), latency_ms=latency)
    _check_cycle([x for x in out if not (isinstance(x, Damage) and x.kind in ("turnaround_short", "timing_conflict"))],
                 marked)


def test_escape_cut_inside_a_read_still_marks_the_idle_byte():
    # the read ends after "FF 00"; the marked byte comes with the next read (termios(3) escapes)
    req, rsp = POLLS[1]
    stream = req + b"\xff\x00"
    t_rsp = T0 + 10_000_000 + 6_000_000 + len(rsp) * CHAR_NS  # the answer 6 ms after the request
    records = reads_to_records([(T0 + 10_000_000, stream), (int(t_rsp), b"\x00" + rsp + b"\xff\x00\xfe")],
                               parmrk=True)
    out = decode(records)
    assert frames(out) == [req, rsp]
    assert kinds(out) == Counter({"idle_line_byte": 2})


def test_idle_bytes_of_every_value_seen_are_told_apart():
    # 0xFF after some stations' answers (FIELD-NOTES 21); data 0xFF is escaped FF FF (termios(3))
    line = wire(POLLS, idle=(MASTER_IDLE, (0xFE, 0xFF, 0xFE)))
    for marked in (True, False):
        out = decode(reads_to_records(adapter_reads(line, 16.0, marked), parmrk=marked), latency_ms=16.0)
        assert frames(out) == EXPECTED
        assert [t.outcome for t in out if isinstance(t, Transaction)] == ["ok"] * 44
        assert kinds(out) == Counter({"idle_line_byte": 88})


def test_the_bulk_path_gives_the_same_frames_and_events():
    # five cycles of flag-free reads (over the bulk path's 2048 bytes), through feed_batch
    line = wire(POLLS, cycles=5)
    records = reads_to_records(adapter_reads(line, 16.0, False), parmrk=False)
    dec = Decoder(DecoderConfig(serial=FMT, latency_ms={0: 16.0}))
    outs = [dec.feed_batch(RecordBatch.from_records(records)), dec.flush()]
    fr = [raw for o in outs for raw in o.frames["raw"]]
    tx = [x for o in outs for x in o.transactions["outcome"]]
    ev = Counter(str(k) for o in outs for k in o.events["kind"])
    assert fr == EXPECTED * 5
    assert tx == ["ok"] * 220
    assert ev == Counter({"idle_line_byte": 440})
    assert frames(decode(records, latency_ms=16.0)) == EXPECTED * 5


def test_a_marked_byte_inside_a_frame_stays_a_line_error():
    req, rsp = POLLS[1]
    # the answer's byte count arrives marked bad; its value is right, so the CRC still checks
    # (a marked 0x00 would read as a break, termios(3): a byte other than 0x00 is marked here)
    assert rsp[2]
    reads = [(T0 + 10_000_000, req), (T0 + 20_000_000, rsp[:2] + b"\xff\x00" + rsp[2:3] + rsp[3:])]
    out = decode(reads_to_records(reads, parmrk=True))
    assert frames(out) == [req, rsp]
    assert kinds(out) == Counter({"line_error": 1})


def test_frame_whose_rule_allows_one_more_byte_keeps_its_length_before_a_zero():
    # FC03 answer of one register: 7 bytes; an FC03 request is 8 (MAP V1.1b3 §6.3)
    answer = read_holding_answer(5, [0x1234])
    request = read_holding(5, 0x0400, 2)  # read as an answer its byte count 4 gives 9 bytes
    for frame in (answer, request):
        assert _CRC(frame + b"\x00") == 0
        # framing alone (no timing, no marks): the frame keeps its length, the 0x00 is apart
        n = len(frame)
        spans = split_frames(frame + b"\x00" + read_holding(6, 0, 1))
        assert [(s.start, s.end, bool(s.shape)) for s in spans] == [(0, n, True), (n, n + 1, False),
                                                                     (n + 1, n + 9, True)]
        dec = Decoder(DecoderConfig(serial=FMT, latency_ms={0: 1.0}))
        out = dec.feed(0, T0 + 10_000_000, frame + b"\x00") + dec.flush_events()
        assert frames(out) == [frame]
        assert kinds(out)["idle_line_byte"] == 1  # (the lone answer is also an orphan: no request)


def _crc_ending_in_zero(make, values=range(1, 5000)):
    for v in values:
        frame = make(v)
        if frame[-1] == 0:
            return frame
    raise AssertionError("no frame whose CRC high byte is 0x00")


def test_a_real_answer_whose_crc_ends_in_zero_keeps_its_last_byte():
    # One frame in 256 has a CRC high byte of 0x00; its prefix then checks too. After its own
    # request, the answer that fits the request wins over "request + stray 00".
    answer = _crc_ending_in_zero(lambda v: read_holding_answer(9, [v, 7]))
    request = read_holding(9, 0x0000, 2)
    assert _CRC(answer[:-1]) == 0 and (8, REQUEST) in candidate_lengths(answer, 0, 8)
    dec = Decoder(DecoderConfig(serial=FMT, latency_ms={0: 1.0}))
    out = dec.feed(0, T0 + 10_000_000, request) + dec.feed(0, T0 + 20_000_000, answer + read_holding(9, 2, 1))
    out += dec.flush_events()
    assert frames(out)[:2] == [request, answer]
    assert [t.outcome for t in out if isinstance(t, Transaction)][:1] == ["ok"]


def test_a_real_request_whose_crc_ends_in_zero_keeps_its_last_byte_after_an_answer():
    # the prefix of an FC03 request starting at 0x02xx reads as a one-register answer (5 + 2 bytes)
    request = _crc_ending_in_zero(lambda v: read_holding(4, 0x0200 + (v & 0xFF), 1 + (v >> 8)))
    assert _CRC(request[:-1]) == 0
    first = (read_holding(4, 0, 1), read_holding_answer(4, [1]))
    dec = Decoder(DecoderConfig(serial=FMT, latency_ms={0: 1.0}))
    out = dec.feed(0, T0 + 10_000_000, first[0]) + dec.feed(0, T0 + 20_000_000, first[1])
    out += dec.feed(0, T0 + 40_000_000, request + read_holding_answer(4, [2] * request[5]))
    out += dec.flush_events()
    assert frames(out)[:3] == [first[0], first[1], request]


def test_analysis_counts_idle_bytes_per_talker_and_blames_the_bias_not_the_format():
    line = wire(POLLS)
    out = decode(reads_to_records(adapter_reads(line, 16.0, True), parmrk=True), latency_ms=16.0)
    header = CaptureHeader(serial=FMT, ports=[PortInfo(0, "ttyUSB0", 1.0, "user")],
                           start_utc="2026-03-04T21:00:00+00:00", start_monotonic_ns=T0, source="simulate",
                           capture_id="idle-line")
    result = analyze_tables(header, [DecodeOutput.from_objects(out)])
    assert result.bus.events == {"idle_line_byte": 88}
    assert result.bus.unattributed_events == {"idle_line_byte": 44}  # the master's
    assert {s.address: s.events.get("idle_line_byte", 0) for s in result.stations} == {1: 11, 2: 11, 3: 11, 17: 11}
    assert {s.address: s.ok for s in result.stations} == {1: 11, 2: 11, 3: 11, 17: 11}
    found = {f.rule: f for f in evaluate(result)}
    assert "line-not-held-idle" in found
    assert not {"sniffer-format", "duplicate-address", "idle-stray-bytes", "unreadable-line"} & set(found)
    f = found["line-not-held-idle"]
    assert "fail-safe bias / termination" in f.statement
    assert f.evidence["by_talker"] == {"master": 44, "1": 11, "2": 11, "3": 11, "17": 11}
    assert "MSL §3.4.6" in f.causes[0].cause and "not a measurement of the wire" in f.caution


def test_answer_lengths_a_request_fixes():
    # MAP V1.1b3 §6.1: FC01 request 01 00 13 00 13 (19 coils) -> answer 01 03 CD 6B 05: 3 data bytes
    assert answer_length(rtu(bytes.fromhex("0101001300 13".replace(" ", "")))) == 8
    # MAP V1.1b3 §6.3: FC03 request 03 00 6B 00 03 -> answer 03 06 + 6 bytes
    assert answer_length(read_holding(1, 0x6B, 3)) == 11
    # MAP V1.1b3 §6.6: FC06 answers echo the request
    assert answer_length(write_single(1, 1, 3)) == 8
    # MAP V1.1b3 §6.17 (FC11 report server ID): the device decides
    assert answer_length(rtu(b"\x01\x11")) is None


def test_next_request_after_a_silent_station_keeps_its_length_before_a_lone_zero():
    # Station 7 does not answer an FC03 of one register; the master moves on to another block
    # of station 7 at 0x04xx: read as an answer its byte count 4 gives 9 bytes, but the answer
    # to one register would be 7 (MAP V1.1b3 §6.3), so the 0x00 behind it stays apart.
    first, second = read_holding(7, 0x0010, 1), read_holding(7, 0x0400, 2)
    assert _CRC(second + b"\x00") == 0
    dec = Decoder(DecoderConfig(serial=FMT, latency_ms={0: 1.0}))
    out = dec.feed(0, T0 + 10_000_000, first + b"\x00")
    out += dec.feed(0, T0 + 300_000_000, second + b"\x00")
    out += dec.feed(0, T0 + 600_000_000, read_holding(8, 0, 1)) + dec.flush_events()
    assert frames(out) == [first, second, read_holding(8, 0, 1)]
    assert kinds(out)["idle_line_byte"] == 2


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(st.tuples(st.integers(0, 43), st.booleans()), min_size=1, max_size=12),
       st.sampled_from([0x00, 0xFE, 0xFF]), st.booleans(), st.lists(st.integers(0, 10_000), max_size=12))
def test_any_polls_with_idle_bytes_in_any_chunking_give_the_frames_alone(picks, station_idle, marked, cuts):
    # polls picked at random (some unanswered), every frame followed by its driver's idle byte;
    # no timing at all (untimed), so only bytes, marks and length rules decide.
    # The one case bytes alone cannot settle: after an unanswered request to station N, a
    # request to N whose "frame + unmarked 00" has exactly the length of the answer awaited
    # (answer or next request? the framer keeps a real answer whose CRC ends in 0x00).
    assume(marked or not any(not a and POLLS[k][0][0] == POLLS[k2][0][0] and POLLS[k][0][1] == POLLS[k2][0][1]
                             for (k, a), (k2, _a2) in zip(picks, picks[1:])))
    expected, line = [], []
    for k, answered in picks:
        req, rsp = POLLS[k]
        for raw, idle in ((req, MASTER_IDLE), (rsp, station_idle))[:2 if answered else 1]:
            expected.append(raw)
            line += [(0.0, bytes((b,)), False) for b in raw] + [(0.0, bytes((idle,)), True)]
    stream = b"".join(escaped(b, m) if marked else b for _t, b, m in line)
    points = sorted({c % (len(stream) + 1) for c in cuts} | {0, len(stream)})
    reads = [(T0 + 1_000_000 * i, stream[a:b]) for i, (a, b) in enumerate(zip(points, points[1:]))]
    out = decode(reads_to_records(reads, parmrk=marked), untimed=True)
    assert frames(out) == expected
    assert kinds(out)["idle_line_byte"] == len(expected)
    assert not {"stray_bytes", "line_error", "break", "crc_error"} & set(kinds(out))


@pytest.mark.parametrize("marked", [True, False], ids=["marked", "unmarked"])
def test_four_wire_ports_tell_the_talker_from_their_role(marked):
    # One adapter on the master's pair, one on the stations' pair (port roles): each hears its
    # own talker's frames and idle bytes.
    line = wire(POLLS)
    idle_at = [i for i, x in enumerate(line) if x[2]]
    requests, answers, talker = [], [], 0
    start = 0
    for i in idle_at:
        (requests if talker == 0 else answers).extend(line[start:i + 1])
        talker, start = 1 - talker, i + 1
    records = [Record(0, r.t_ns, r.data, r.flags)
               for r in reads_to_records(adapter_reads(requests, 16.0, marked), parmrk=marked)]
    records += [Record(1, r.t_ns, r.data, r.flags)
                for r in reads_to_records(adapter_reads(answers, 16.0, marked), parmrk=marked)]
    records.sort(key=lambda r: r.t_ns)
    dec = Decoder(DecoderConfig(serial=FMT, latency_ms={0: 16.0, 1: 16.0}, port_roles={0: "master", 1: "slaves"}))
    out: list = []
    for r in records:
        out += dec.feed(r.port, r.t_ns, r.data, r.flags)
    out += dec.flush_events()
    txs = [x for x in out if isinstance(x, Transaction)]
    assert [t.outcome for t in txs] == ["ok"] * 44
    idle = [x for x in out if isinstance(x, Damage)]
    assert Counter(x.kind for x in idle) == Counter({"idle_line_byte": 88})
    assert Counter(x.station for x in idle) == Counter({-1: 44, 1: 11, 2: 11, 3: 11, 17: 11})


@pytest.mark.slow
def test_the_simulated_unbiased_line_answers_every_poll_and_names_the_bias(tmp_path):
    # issue 12, "Done when": a line that floats between frames (the simulator's fault-unbiased:
    # a marked 0x00 after the master, 0xFE after a station) gives every poll answered, no orphan or
    # duplicate-address events, and the bias finding; never the sniffer-format one.
    from buswitness.analysis import AnalysisOptions, analyze
    from buswitness.capture.sources import open_capture
    from buswitness.simulate import load_scenario, simulate
    sim = simulate(load_scenario("fault-unbiased"), duration_s=300, seed=1, keep_tables=False)
    sim.write(tmp_path / "u.bwcap")
    result = analyze(open_capture(tmp_path / "u.bwcap"), AnalysisOptions(progress=False))
    for s in result.stations:
        truth = sim.truth.stations[s.address]
        assert (s.requests, s.answered) == (truth["requests"], truth["answered"]) and s.requests == s.answered
    for kind in ("orphan_response", "unexpected_responder", "collision"):
        assert kind not in result.bus.events
    rules = [f.rule for f in result.findings]
    assert "line-not-held-idle" in rules and "sniffer-format" not in rules
