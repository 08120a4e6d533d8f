"""Chunk boundaries never change the result, and any bytes at all give only documented events."""

import os
import time
from itertools import pairwise

from buswitness.capture.fileformat import FLAG_BREAK, FLAG_LINE_ERROR, FLAG_LOST, Record, RecordBatch
from buswitness.decode import Damage, Decoder, DecoderConfig, Frame, Transaction, append_crc
from buswitness.decode.events import EVENT_KINDS, OUTCOMES
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from test_decode_wire import FMT_19200

# Spec vectors as RTU frames on station 1 (MAP V1.1b3 examples; CRC by crcmod).
VECTORS = [append_crc(b"\x01" + bytes.fromhex(h)) for h in (
    "0100130013", "0103CD6B05", "03006B0003", "0306022B00000064", "0500ACFF00", "0600010003", "076D",
    "080000A537", "0BFFFF0108", "0F0013000A02CD01", "0F0013000A", "100001000204000A0102", "1000010002",
    "1804DE", "180006000201B81284", "8102")]
# MSL V1.02 p39/41: the frame 02 07 and its CRC 41 12 (a request on station 2).
VECTORS.append(bytes.fromhex("02074112"))

UNTIMED = DecoderConfig(serial=FMT_19200, untimed=True)


def frames_of(chunks: list[bytes], config: DecoderConfig = UNTIMED) -> list[bytes]:
    dec = Decoder(config)
    out = []
    for i, chunk in enumerate(chunks):
        out += dec.feed(0, 1_000_000 * i, chunk)
    out += dec.flush_events()
    return [x.raw for x in out if isinstance(x, Frame)]


def chunked(data: bytes, cuts: list[int]) -> list[bytes]:
    points = sorted({c % (len(data) + 1) for c in cuts} | {0, len(data)})
    return [data[a:b] for a, b in pairwise(points)]


def test_every_vector_decodes_whole_and_byte_by_byte():
    for v in VECTORS:
        assert frames_of([v]) == [v]
        assert frames_of([bytes([b]) for b in v]) == [v]


@given(st.lists(st.sampled_from(VECTORS), min_size=1, max_size=6), st.lists(st.integers(0, 10_000), max_size=12))
def test_random_chunkings_of_glued_vectors_give_the_same_frames(seq, cuts):
    data = b"".join(seq)
    assert frames_of(chunked(data, cuts)) == frames_of([data])


@settings(suppress_health_check=[HealthCheck.too_slow])
@given(st.sampled_from(VECTORS), st.binary(max_size=40), st.binary(max_size=40), st.lists(st.integers(0, 10_000),
                                                                                         max_size=8))
def test_vector_survives_noise_before_and_after_in_any_chunking(vector, before, after, cuts):
    # A 0x00 right after a frame keeps its CRC valid (the CRC of 0x00 from a zero state is
    # zero), so "frame + 00" checks when a rule allows that length; the length rules choose
    # the frame and the 0x00 stays apart (an idle-line byte, FIELD-NOTES 21).
    data = before + vector + after
    whole = frames_of([data])
    assert vector in whole
    assert frames_of(chunked(data, cuts)) == whole


RECORDS = st.lists(st.tuples(st.integers(0, 2), st.integers(0, 50_000_000), st.binary(max_size=80),
                             st.sampled_from([0, 0, 0, FLAG_LINE_ERROR, FLAG_BREAK, FLAG_LOST, 0x08, 0x10, 0x20])),
                   max_size=30)


def _check(items: list) -> None:
    for x in items:
        assert isinstance(x, (Frame, Damage, Transaction))
        if isinstance(x, Damage):
            assert x.kind in EVENT_KINDS
        if isinstance(x, Transaction):
            assert x.outcome in OUTCOMES


@settings(suppress_health_check=[HealthCheck.too_slow], deadline=None)
@given(RECORDS, st.sampled_from(["rtu", "ascii"]), st.booleans())
def test_fuzzed_records_give_only_documented_results(records, protocol, untimed):
    dec = Decoder(DecoderConfig(serial=FMT_19200, protocol=protocol, untimed=untimed))
    t = 0
    for port, dt, data, flags in records:
        t += dt
        _check(dec.feed(port, t, data, flags))
    _check(dec.flush_events())


@settings(suppress_health_check=[HealthCheck.too_slow], deadline=None)
@given(RECORDS)
def test_fuzzed_batches_give_documented_tables(records):
    t, recs = 0, []
    for port, dt, data, flags in records:
        t += dt
        recs.append(Record(port, t, data, flags))
    dec = Decoder(DecoderConfig(serial=FMT_19200))
    outs = [dec.feed_batch(RecordBatch.from_records(recs)), dec.flush()]
    for out in outs:
        assert set(out.events["kind"].astype(str)) <= set(EVENT_KINDS)
        assert set(out.transactions["outcome"].astype(str)) <= set(OUTCOMES)


def _garbage_time(n: int) -> float:
    data = os.urandom(n)
    best = float("inf")
    for _ in range(2):
        start = time.perf_counter()
        frames_of([data[i:i + 256] for i in range(0, n, 256)], DecoderConfig(serial=FMT_19200))
        best = min(best, time.perf_counter() - start)
    return best


def test_garbage_costs_linear_time_not_quadratic():
    # 4x the bytes may cost about 4x the time; quadratic resync would cost 16x.
    small, large = _garbage_time(16 * 1024), _garbage_time(64 * 1024)
    assert large < 10 * small + 0.05
