"""Function-code fields against the MAP examples, and against frames pymodbus encodes independently."""

import pytest
from buswitness.decode import append_crc, decode_fields, exception_name, split_frames
from buswitness.decode.lengths import EITHER, REQUEST, RESPONSE

# (source, direction, PDU hex as printed in the spec, expected fields). Station 1 is ours.
MAP_VECTORS = [
    ("MAP V1.1b3 p12", "request", "0100130013", {"start": 0x13, "quantity": 0x13}),
    ("MAP V1.1b3 p12", "response", "0103CD6B05", {"byte_count": 3,
                                                  "values": [1, 0, 1, 1, 0, 0, 1, 1, 1, 1, 0, 1, 0, 1, 1, 0,
                                                             1, 0, 1, 0, 0, 0, 0, 0]}),
    ("MAP V1.1b3 p16", "request", "03006B0003", {"start": 0x6B, "quantity": 3}),
    ("MAP V1.1b3 p16", "response", "0306022B00000064", {"byte_count": 6, "values": [0x022B, 0, 0x64]}),
    ("MAP V1.1b3 p18", "request", "0500ACFF00", {"address": 0xAC, "value": 0xFF00}),
    ("MAP V1.1b3 p19", "request", "0600010003", {"address": 1, "value": 3}),
    ("MAP V1.1b3 p20", "response", "076D", {"status": 0x6D}),
    ("MAP V1.1b3 p22", "request", "080000A537", {"sub_function": 0, "data": bytes.fromhex("A537")}),
    ("MAP V1.1b3 p25", "response", "0BFFFF0108", {"status": 0xFFFF, "event_count": 0x0108}),
    ("MAP V1.1b3 p29", "request", "0F0013000A02CD01", {"start": 0x13, "quantity": 10, "byte_count": 2,
                                                       "values": [1, 0, 1, 1, 0, 0, 1, 1, 1, 0]}),
    ("MAP V1.1b3 p29", "response", "0F0013000A", {"start": 0x13, "quantity": 10}),
    ("MAP V1.1b3 p30", "request", "100001000204000A0102", {"start": 1, "quantity": 2, "values": [0x000A, 0x0102]}),
    ("MAP V1.1b3 p30", "response", "1000010002", {"start": 1, "quantity": 2}),
    ("MAP V1.1b3 p40", "request", "1804DE", {"pointer": 0x04DE}),
    ("MAP V1.1b3 p40", "response", "1800060002 01B81284".replace(" ", ""),
     {"byte_count": 6, "fifo_count": 2, "values": [0x01B8, 0x1284]}),
    ("MAP V1.1b3 p49", "response", "8102", {"exception_code": 2, "exception": "ILLEGAL DATA ADDRESS"}),
]


@pytest.mark.parametrize("source,direction,pdu,expected", MAP_VECTORS, ids=[v[2] for v in MAP_VECTORS])
def test_spec_example_decodes_to_its_fields(source, direction, pdu, expected):
    frame = append_crc(b"\x01" + bytes.fromhex(pdu))
    fields = decode_fields(frame, direction)
    assert {k: fields[k] for k in expected} == expected, source


@pytest.mark.parametrize("source,direction,pdu,expected", MAP_VECTORS, ids=[v[2] for v in MAP_VECTORS])
def test_spec_example_is_framed_whole_with_its_direction(source, direction, pdu, expected):
    frame = append_crc(b"\x01" + bytes.fromhex(pdu))
    spans = split_frames(frame)
    assert [(s.start, s.end) for s in spans] == [(0, len(frame))], source
    want = REQUEST if direction == "request" else RESPONSE
    assert spans[0].shape in (want, EITHER)


def test_exception_names_follow_the_spec_table():
    # MAP V1.1b3 p48-49
    assert exception_name(0x06) == "SERVER DEVICE BUSY"
    assert exception_name(0x0B) == "GATEWAY TARGET DEVICE FAILED TO RESPOND"
    assert exception_name(0x42) == "exception 0x42"


def test_mask_write_example_fields():
    # MAP V1.1b3 p36-37: address 4, AND mask F2, OR mask 25
    fields = decode_fields(append_crc(bytes.fromhex("011600040" + "0F20025")), "request")
    assert (fields["address"], fields["and_mask"], fields["or_mask"]) == (4, 0xF2, 0x25)


def test_report_server_id_keeps_hostile_text_as_bytes():
    payload = b"<script>alert(1)</script>\xff"
    frame = append_crc(bytes([0x07, 0x11, len(payload)]) + payload)
    fields = decode_fields(frame, "response")
    assert fields["data"] == payload and isinstance(fields["data"], bytes)
    assert [(s.start, s.end) for s in split_frames(frame)] == [(0, len(frame))]


def test_device_identification_objects_are_bytes():
    objects = [(0, b"<img onerror=x>"), (1, b"\x00\x01"), (2, b"v1")]
    body = b"".join(bytes([oid, len(v)]) + v for oid, v in objects)
    frame = append_crc(bytes([0x09, 0x2B, 0x0E, 0x01, 0x01, 0x00, 0x00, len(objects)]) + body)
    spans = split_frames(frame)
    assert [(s.start, s.end, s.shape) for s in spans] == [(0, len(frame), RESPONSE)]
    fields = decode_fields(frame, "response")
    assert fields["objects"] == dict(objects)


def test_user_defined_code_is_framed_by_crc_and_kept_raw():
    frame = append_crc(bytes.fromhex("0541DEADBEEF"))
    assert [(s.start, s.end) for s in split_frames(frame)] == [(0, len(frame))]
    assert decode_fields(frame, "request")["data"] == bytes.fromhex("DEADBEEF")


def test_short_or_odd_frames_never_raise():
    for raw in (b"\x01", b"\x01\x03", append_crc(b"\x01\x03"), append_crc(b"\x01\x2b")):
        decode_fields(raw, "response")
        decode_fields(raw, "request")


# --- pymodbus as an independent encoder -------------------------------------------------------

pymodbus = pytest.importorskip("pymodbus")
from pymodbus.framer import FramerRTU
from pymodbus.pdu import ExceptionResponse
from pymodbus.pdu.bit_message import (
    ReadCoilsRequest,
    ReadCoilsResponse,
    WriteMultipleCoilsRequest,
    WriteSingleCoilRequest,
)
from pymodbus.pdu.decoders import DecodePDU
from pymodbus.pdu.mei_message import ReadDeviceInformationRequest
from pymodbus.pdu.other_message import ReportDeviceIdResponse
from pymodbus.pdu.register_message import (
    MaskWriteRegisterRequest,
    ReadHoldingRegistersRequest,
    ReadHoldingRegistersResponse,
    ReadWriteMultipleRegistersRequest,
    WriteMultipleRegistersRequest,
    WriteMultipleRegistersResponse,
    WriteSingleRegisterRequest,
)

PYMODBUS_CASES = [
    (ReadHoldingRegistersRequest(address=0x6B, count=3, dev_id=17), "request", {"start": 0x6B, "quantity": 3}),
    (ReadHoldingRegistersResponse(registers=[0x022B, 0, 0x64], dev_id=17), "response",
     {"values": [0x022B, 0, 0x64]}),
    (ReadCoilsRequest(address=0x13, count=0x13, dev_id=3), "request", {"start": 0x13, "quantity": 0x13}),
    (ReadCoilsResponse(bits=[True, False, True, True, False, False, True, True], dev_id=3), "response",
     {"values": [1, 0, 1, 1, 0, 0, 1, 1]}),
    (WriteSingleCoilRequest(address=0xAC, bits=[True], dev_id=250), "request", {"address": 0xAC, "value": 0xFF00}),
    (WriteSingleRegisterRequest(address=1, registers=[3], dev_id=255), "request", {"address": 1, "value": 3}),
    (WriteMultipleRegistersRequest(address=1, registers=[10, 258], dev_id=1), "request",
     {"start": 1, "quantity": 2, "values": [10, 258]}),
    (WriteMultipleRegistersResponse(address=1, count=2, dev_id=1), "response", {"start": 1, "quantity": 2}),
    (WriteMultipleCoilsRequest(address=0x13, bits=[True, False, True, True, False, False, True, True, True, False],
                               dev_id=1), "request", {"start": 0x13, "quantity": 10}),
    (MaskWriteRegisterRequest(address=4, and_mask=0xF2, or_mask=0x25, dev_id=2), "request",
     {"address": 4, "and_mask": 0xF2, "or_mask": 0x25}),
    (ReadWriteMultipleRegistersRequest(read_address=3, read_count=6, write_address=14, write_registers=[0xFF, 0xFF],
                                       dev_id=1), "request",
     {"read_start": 3, "read_quantity": 6, "write_start": 14, "write_quantity": 2, "values": [0xFF, 0xFF]}),
    (ReadDeviceInformationRequest(read_code=1, object_id=0, dev_id=9), "request", {"read_code": 1, "object_id": 0}),
    (ReportDeviceIdResponse(identifier=b"<b>pump</b>", dev_id=4), "response", {}),
    (ExceptionResponse(0x03, 0x02, device_id=5), "response", {"exception_code": 2}),
]


@pytest.mark.parametrize("pdu,direction,expected", PYMODBUS_CASES, ids=[type(c[0]).__name__ for c in PYMODBUS_CASES])
def test_pymodbus_encoded_frame_decodes_to_the_same_fields(pdu, direction, expected):
    frame = FramerRTU(DecodePDU(direction == "request")).buildFrame(pdu)
    spans = split_frames(frame)
    assert [(s.start, s.end) for s in spans] == [(0, len(frame))]
    fields = decode_fields(frame, direction)
    assert fields["station"] == frame[0]
    assert {k: fields[k] for k in expected} == expected
