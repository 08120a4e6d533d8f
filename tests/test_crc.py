"""CRC-16/MODBUS and LRC against the specification and the CRC catalogue."""

import crcmod.predefined
import numpy as np
from buswitness.decode.crc import append_crc, crc16_modbus, crc16_rows, crc_ok, lrc


def test_catalogue_check_value():
    # CRC catalogue (reveng) CRC-16/MODBUS: check = 0x4B37 over b"123456789"
    assert crc16_modbus(b"123456789") == 0x4B37


def test_spec_example_0207_is_sent_as_41_12():
    # MSL V1.02 section 6.2.2 p39/p41: frame 02 07 -> CRC 0x1241, sent low byte first as 41 12
    assert crc16_modbus(bytes([0x02, 0x07])) == 0x1241
    assert append_crc(bytes([0x02, 0x07]))[-2:] == bytes([0x41, 0x12])


def test_read_holding_registers_frame():
    # REFERENCES.md derived frame (calc, self-consistency): 01 03 00 6B 00 03 74 17
    assert append_crc(bytes.fromhex("0103006B0003")) == bytes.fromhex("0103006B00037417")


def test_widely_quoted_tutorial_frame():
    # from memory: the often-quoted frame 11 03 00 6B 00 03 76 87
    assert crc_ok(bytes.fromhex("1103006B00037687"))


def test_residue_of_a_good_frame_is_zero():
    # CRC catalogue: CRC-16/MODBUS residue 0
    assert crc16_modbus(append_crc(b"\x01\x81\x02")) == 0


def test_vectorised_rows_match_crcmod():
    # crcmod's predefined "modbus" CRC as the independent reference
    ref = crcmod.predefined.mkPredefinedCrcFun("modbus")
    rng = np.random.default_rng(1)
    rows = rng.integers(0, 256, size=(500, 13), dtype=np.uint8)
    got = crc16_rows(rows)
    assert [int(x) for x in got] == [ref(r.tobytes()) for r in rows]


def test_short_frames_are_never_crc_ok():
    assert not crc_ok(b"\x01\x03")


def test_lrc_spec_rule():
    # MSL V1.02 section 6.2.1 p38: two's complement of the byte sum; ":0103006B00038E" has LRC 0x8E
    # (REFERENCES.md derived ASCII frame, calc)
    assert lrc(bytes.fromhex("0103006B0003")) == 0x8E
