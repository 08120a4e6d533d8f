"""Fields of the public Modbus function codes (MAP V1.1b3 section 6) and the exception names.

:func:`decode_fields` turns one frame into a plain dict of its fields. Text that stations
send (FC11 run data, FC2B/0E device identification objects) is kept as ``bytes``: it may
hold anything at all, and whoever renders it must escape it.
"""

from __future__ import annotations

from typing import Any

#: Exception codes and their names (MAP V1.1b3 section 7, p47-49).
EXCEPTION_NAMES = {
    0x01: "ILLEGAL FUNCTION",
    0x02: "ILLEGAL DATA ADDRESS",
    0x03: "ILLEGAL DATA VALUE",
    0x04: "SERVER DEVICE FAILURE",
    0x05: "ACKNOWLEDGE",
    0x06: "SERVER DEVICE BUSY",
    0x08: "MEMORY PARITY ERROR",
    0x0A: "GATEWAY PATH UNAVAILABLE",
    0x0B: "GATEWAY TARGET DEVICE FAILED TO RESPOND",
}

FUNCTION_NAMES = {
    0x01: "read coils",
    0x02: "read discrete inputs",
    0x03: "read holding registers",
    0x04: "read input registers",
    0x05: "write single coil",
    0x06: "write single register",
    0x07: "read exception status",
    0x08: "diagnostics",
    0x0B: "get comm event counter",
    0x0C: "get comm event log",
    0x0F: "write multiple coils",
    0x10: "write multiple registers",
    0x11: "report server id",
    0x14: "read file record",
    0x15: "write file record",
    0x16: "mask write register",
    0x17: "read/write multiple registers",
    0x18: "read FIFO queue",
    0x2B: "encapsulated interface transport",
}

#: User-defined function codes (MAP V1.1b3 section 5).
USER_DEFINED = frozenset(range(65, 73)) | frozenset(range(100, 111))


def exception_name(code: int) -> str:
    """Name of an exception code, or ``exception 0xNN`` for codes the specification does not define."""
    return EXCEPTION_NAMES.get(code, f"exception 0x{code:02X}")


def function_name(fc: int) -> str:
    """Name of a function code; exceptions and user-defined codes are named as such."""
    if fc & 0x80:
        return f"exception to {function_name(fc & 0x7F)}"
    if fc in FUNCTION_NAMES:
        return FUNCTION_NAMES[fc]
    if fc in USER_DEFINED:
        return f"user-defined 0x{fc:02X}"
    return f"function 0x{fc:02X}"


def _u16(b: bytes, i: int) -> int:
    return b[i] << 8 | b[i + 1]


def _words(b: bytes) -> list[int]:
    return [_u16(b, i) for i in range(0, len(b) - 1, 2)]


def _bits(b: bytes, count: int | None = None) -> list[int]:
    bits = [(byte >> k) & 1 for byte in b for k in range(8)]
    return bits if count is None else bits[:count]


def _read_device_id(pdu: bytes, is_request: bool) -> dict[str, Any]:
    out: dict[str, Any] = {"mei_type": pdu[1] if len(pdu) > 1 else None}
    if len(pdu) < 2 or pdu[1] != 0x0E:
        out["data"] = pdu[2:]
        return out
    if is_request:
        out.update(read_code=pdu[2] if len(pdu) > 2 else None, object_id=pdu[3] if len(pdu) > 3 else None)
        return out
    if len(pdu) < 7:
        out["data"] = pdu[2:]
        return out
    out.update(read_code=pdu[2], conformity=pdu[3], more_follows=pdu[4], next_object_id=pdu[5])
    objects: dict[int, bytes] = {}
    pos = 7
    for _ in range(pdu[6]):
        if pos + 2 > len(pdu):
            break
        oid, size = pdu[pos], pdu[pos + 1]
        objects[oid] = bytes(pdu[pos + 2:pos + 2 + size])
        pos += 2 + size
    out["objects"] = objects
    return out


def _file_sub_requests(data: bytes, write: bool) -> list[dict[str, Any]]:
    subs = []
    pos = 0
    while pos + 7 <= len(data):
        ref, file_no, record, length = data[pos], _u16(data, pos + 1), _u16(data, pos + 3), _u16(data, pos + 5)
        sub: dict[str, Any] = {"reference_type": ref, "file": file_no, "record": record, "length": length}
        pos += 7
        if write:
            sub["values"] = _words(data[pos:pos + 2 * length])
            pos += 2 * length
        subs.append(sub)
    return subs


def decode_fields(raw: bytes, direction: str) -> dict[str, Any]:
    """The fields of an RTU frame (address, PDU, CRC) seen as ``request`` or ``response``.

    Unknown and user-defined codes give ``data`` as raw bytes. Never raises on any input of
    at least two bytes; fields a short frame lacks are simply absent.
    """
    if len(raw) < 2:
        return {"data": bytes(raw)}
    pdu = bytes(raw[1:-2]) if len(raw) >= 4 else bytes(raw[1:])
    fc = pdu[0]
    body = pdu[1:]
    out: dict[str, Any] = {"station": raw[0], "function": fc, "name": function_name(fc)}
    req = direction == "request"
    try:
        if fc & 0x80:
            code = body[0]
            out.update(exception_code=code, exception=exception_name(code))
        elif fc in (0x01, 0x02, 0x03, 0x04):
            if req:
                out.update(start=_u16(body, 0), quantity=_u16(body, 2))
            else:
                out["byte_count"] = body[0]
                data = body[1:1 + body[0]]
                out["values"] = _bits(data) if fc in (0x01, 0x02) else _words(data)
        elif fc in (0x05, 0x06):
            out.update(address=_u16(body, 0), value=_u16(body, 2))
        elif fc == 0x07:
            if not req:
                out["status"] = body[0]
        elif fc == 0x08:
            out.update(sub_function=_u16(body, 0), data=body[2:])
        elif fc == 0x0B:
            if not req:
                out.update(status=_u16(body, 0), event_count=_u16(body, 2))
        elif fc == 0x0C:
            if not req:
                out.update(byte_count=body[0], status=_u16(body, 1), event_count=_u16(body, 3),
                           message_count=_u16(body, 5), events=body[7:1 + body[0]])
        elif fc in (0x0F, 0x10):
            out.update(start=_u16(body, 0), quantity=_u16(body, 2))
            if req:
                data = body[5:5 + body[4]]
                out["byte_count"] = body[4]
                out["values"] = _bits(data, out["quantity"]) if fc == 0x0F else _words(data)
        elif fc == 0x11:
            if not req:
                out.update(byte_count=body[0], data=body[1:1 + body[0]])
        elif fc in (0x14, 0x15):
            out["byte_count"] = body[0]
            if req or fc == 0x15:
                out["sub_requests"] = _file_sub_requests(body[1:1 + body[0]], write=fc == 0x15)
            else:
                out["data"] = body[1:1 + body[0]]
        elif fc == 0x16:
            out.update(address=_u16(body, 0), and_mask=_u16(body, 2), or_mask=_u16(body, 4))
        elif fc == 0x17:
            if req:
                out.update(read_start=_u16(body, 0), read_quantity=_u16(body, 2), write_start=_u16(body, 4),
                           write_quantity=_u16(body, 6), byte_count=body[8], values=_words(body[9:9 + body[8]]))
            else:
                out.update(byte_count=body[0], values=_words(body[1:1 + body[0]]))
        elif fc == 0x18:
            if req:
                out["pointer"] = _u16(body, 0)
            else:
                out.update(byte_count=_u16(body, 0), fifo_count=_u16(body, 2), values=_words(body[4:]))
        elif fc == 0x2B:
            out.update(_read_device_id(pdu, req))
        else:
            out["data"] = body
    except IndexError:
        out["data"] = body
        out["short"] = True
    return out
