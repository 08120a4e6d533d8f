"""RTU framing by length rules and CRC, with resynchronisation after noise."""

import os

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
    assert explained_fraction(os.urandom(4096)) < 0.01


def test_explained_fraction_of_nothing_is_zero():
    assert explained_fraction(b"") == 0.0
