"""Modbus ASCII framing (MSL V1.02 section 2.5.2) through the same events as RTU."""

from buswitness.decode import Damage, Decoder, DecoderConfig, Frame, SerialFormat, Transaction, lrc
from buswitness.decode.ascii import decode_ascii_frame


def ascii_frame(binary: bytes) -> bytes:
    return b":" + (binary + bytes([lrc(binary)])).hex().upper().encode() + b"\r\n"


# REFERENCES.md derived frame (calc): ASCII :0103006B00038E CRLF; MAP V1.1b3 p15-17 read example
REQ = b":0103006B00038E\r\n"
RSP = ascii_frame(bytes.fromhex("010306022B00000064"))
CFG = DecoderConfig(serial=SerialFormat.parse("7E1", 9600), protocol="ascii", latency_ms={0: 1.0})


def decode(chunks):
    dec = Decoder(CFG)
    out = []
    for i, chunk in enumerate(chunks):
        out += dec.feed(0, 1_000_000_000 + i * 20_000_000, chunk)
    return out + dec.flush_events()


def test_lrc_example_from_the_spec():
    # MSL V1.02 section 6.2.1 p38: LRC is the two's complement of the byte sum; our derived frame ends 8E
    assert lrc(bytes.fromhex("0103006B0003")) == 0x8E
    assert decode_ascii_frame(REQ) == bytes.fromhex("0103006B00038E")


def test_request_and_response_pair_into_a_transaction():
    out = decode([REQ[:7], REQ[7:], RSP])
    frames = [x for x in out if isinstance(x, Frame)]
    assert [f.raw[:2] for f in frames] == [b"\x01\x03", b"\x01\x03"]
    assert [f.wire_length for f in frames] == [len(REQ), len(RSP)]
    assert [t.outcome for t in out if isinstance(t, Transaction)] == ["ok"]


def test_new_colon_discards_the_frame_in_progress():
    out = decode([b":01030", REQ])
    assert [x.kind for x in out if isinstance(x, Damage)] == ["stray_bytes"]
    assert len([x for x in out if isinstance(x, Frame)]) == 1


def test_bad_lrc_is_damage_not_a_frame():
    bad = REQ.replace(b"8E", b"8F")
    out = decode([bad, REQ])
    assert len([x for x in out if isinstance(x, Frame)]) == 1
    assert [x.raw for x in out if isinstance(x, Damage)] == [bad]
