"""Modbus RTU frames the simulated master and stations send (MAP V1.1b3 layouts, CRC appended)."""

from __future__ import annotations

import struct

from buswitness.decode.crc import append_crc
from buswitness.simulate.scenario import Poll


def request_frame(poll: Poll) -> bytes:
    """The request frame of one poll entry (address, function, fields, CRC)."""
    fc = poll.function
    if fc in (1, 2, 3, 4):
        pdu = struct.pack(">BHH", fc, poll.start, poll.quantity)
    elif fc in (5, 6):
        pdu = struct.pack(">BHH", fc, poll.start, poll.value)
    elif fc == 15:
        nbytes = (poll.quantity + 7) // 8
        values = bytes((poll.value >> (8 * (i % 2))) & 0xFF for i in range(nbytes))
        pdu = struct.pack(">BHHB", fc, poll.start, poll.quantity, nbytes) + values
    elif fc == 17:
        pdu = bytes((fc,))
    elif fc == 43:
        pdu = bytes((fc, 0x0E, 0x01, 0x00))  # MEI type 14, read code 01 (basic), from object 0 (MAP V1.1b3 p43)
    else:  # 16
        pdu = struct.pack(">BHHB", fc, poll.start, poll.quantity, 2 * poll.quantity) + \
            struct.pack(">H", poll.value) * poll.quantity
    return append_crc(bytes((poll.station,)) + pdu)


def response_data_length(poll: Poll) -> int:
    """How many variable data bytes a normal response carries (read functions), else 0."""
    if poll.function in (1, 2):
        return (poll.quantity + 7) // 8
    if poll.function in (3, 4):
        return 2 * poll.quantity
    return 0


def response_frame(address: int, poll: Poll, request: bytes, data: bytes, device_id: bytes = b"") -> bytes:
    """A normal response from ``address``; ``data`` supplies the values of a read, ``device_id`` the
    identification text of FC 17 and FC 43/14."""
    fc = poll.function
    if fc == 17:
        # byte count, server id (device specific: the text), run indicator 0xFF = ON (MAP V1.1b3 p31)
        return append_crc(bytes((address, fc, len(device_id) + 1)) + device_id + b"\xff")
    if fc == 43:
        # MEI 14, read code 01, conformity 01, no more follows, next object 0, one object: 0 (vendor name)
        # with its length and value (MAP V1.1b3 p43-44)
        return append_crc(bytes((address, fc, 0x0E, 0x01, 0x01, 0x00, 0x00, 0x01, 0x00, len(device_id)))
                          + device_id)
    if fc in (1, 2, 3, 4):
        n = response_data_length(poll)
        return append_crc(bytes((address, fc, n)) + data[:n])
    if fc in (5, 6):
        return append_crc(bytes((address,)) + request[1:6])
    return append_crc(struct.pack(">BBHH", address, fc, poll.start, poll.quantity))


def exception_frame(address: int, function: int, code: int) -> bytes:
    """An exception response: function code + 0x80 and the exception code (MAP V1.1b3 p47)."""
    return append_crc(bytes((address, function | 0x80, code)))
