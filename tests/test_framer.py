"""RTU framing by length rules and CRC, with resynchronisation after noise.

Outside check values carry their source inline (source: the MAP/MSL specifications,
TIMING.md or termios(3), as cited beside each).
"""

import os

import numpy as np
from buswitness.decode import explained_fraction, split_frames
from buswitness.decode.crc import append_crc
from buswitness.decode.lengths import REQUEST, RESPONSE

# MAP V1.1b3 p15-17: FC03 request 03 00 6B 00 03 -> response 03 06 02 2B 00 00 00 64 (PDUs, station 1)
READ_REQ = append_crc(bytes.fromhex("01030 06B0003".replace(" ", "")))
READ_RSP = append_crc(bytes.fromhex("010306022B00000064"))
# MAP V1.1b3 p47-49: exception response 81 02 (station 1)
EXC_RSP = append_crc(bytes.fromhex("018102"))


def test_glued_request_and_response_split_by_length_rules():
    spans = split_frames(READ_REQ + READ_RSP)
    assert [(s.start, s.end, s.shape) for s in spans] == [(0, 8, REQUEST), (8, 19, RESPONSE)]


def test_noise_before_a_frame_is_one_damage_run_and_the_frame_survives():
    spans = split_frames(b"\x00\x13\xff" + READ_REQ + EXC_RSP)
    assert [(s.start, s.end, s.shape) for s in spans] == [(0, 3, 0), (3, 11, REQUEST), (11, 16, RESPONSE)]


def test_explained_fraction_of_clean_traffic_is_one():
    assert explained_fraction(READ_REQ + READ_RSP + EXC_RSP) == 1.0


def test_explained_fraction_of_random_bytes_is_near_zero():
    rng = np.random.default_rng(7)
    for _ in range(20):
        assert explained_fraction(rng.bytes(4096)) < 0.01


def test_explained_fraction_of_nothing_is_zero():
    assert explained_fraction(b"") == 0.0


def _decode(chunks, latency_ms=16.0, gap_ns=1_000_000):
    from buswitness.decode import Decoder, DecoderConfig, SerialFormat
    dec = Decoder(DecoderConfig(serial=SerialFormat(19200, 8, "E", 1), latency_ms={0: latency_ms}))
    out = []
    for i, chunk in enumerate(chunks):
        out += dec.feed(0, 1_000_000_000 + i * gap_ns, chunk)
    return out + dec.flush_events()


def _kinds(out):
    from buswitness.decode import Damage, Frame
    return [("frame", x.raw) if isinstance(x, Frame) else (x.kind, x.raw) for x in out if isinstance(x, (Frame, Damage))]


def test_frame_split_across_two_reads_is_one_frame():
    assert _kinds(_decode([READ_REQ[:3], READ_REQ[3:]])) == [("frame", READ_REQ)]


def test_two_frames_and_a_fragment_in_one_read():
    out = _kinds(_decode([READ_REQ + READ_RSP + READ_REQ[:5]]))
    assert out == [("frame", READ_REQ), ("frame", READ_RSP), ("truncated", READ_REQ[:5])]


def test_frame_cut_short_by_a_certain_silence_is_truncated_and_the_next_frame_survives():
    # 1 ms adapter timer, 100 ms between reads: the silence is certain (TIMING.md)
    out = _kinds(_decode([READ_RSP[:6], READ_REQ], latency_ms=1.0, gap_ns=100_000_000))
    assert out == [("truncated", READ_RSP[:6]), ("frame", READ_REQ)]


def test_damaged_frame_between_good_ones_is_a_crc_error():
    bad = bytearray(READ_RSP)
    bad[5] ^= 1
    out = _kinds(_decode([READ_REQ + bytes(bad) + READ_REQ]))
    assert out == [("frame", READ_REQ), ("crc_error", bytes(bad)), ("frame", READ_REQ)]


def test_largest_frame_of_256_bytes_is_accepted():
    # MSL V1.02 p13: 256 bytes at most; FC17 request with 121 registers is 13 + 242 = 255, FC03 answer of 125 is 255
    big = append_crc(bytes([1, 0x14, 251]) + bytes(251))
    assert len(big) == 256
    assert [(s.start, s.end) for s in split_frames(big + READ_REQ)] == [(0, 256), (256, 264)]


def test_byte_count_beyond_the_256_byte_limit_is_no_frame():
    too_big = append_crc(bytes([1, 0x14, 252]) + bytes(252))
    assert not [s for s in split_frames(too_big) if s.shape]


def test_64k_of_garbage_then_a_frame_finds_the_frame():
    data = os.urandom(65536) + READ_REQ + READ_RSP
    spans = split_frames(data)
    assert [s.end for s in spans if s.shape][-2:] == [len(data) - 11, len(data)]
