"""Device identification text from responses to FC 0x11 (report server ID) and FC 0x2B/0x0E.

These are the only bytes on the bus meant to be read as text, and a device can put anything
in them, so the strings returned here are plain ``str`` that every renderer must escape.
"""

from __future__ import annotations

#: Basic and regular object ids of Read Device Identification (MAP V1.1b3 p43-45; ids 3-6 from memory).
DEVICE_ID_OBJECTS = {0: "vendor name", 1: "product code", 2: "revision", 3: "vendor URL", 4: "product name",
                     5: "model name", 6: "application name"}

#: Longest text kept from one response (a report must not be flooded by one device).
MAX_TEXT = 200


def printable(data: bytes) -> str:
    """Bytes as text: printable ASCII kept as is, anything else shown as a dot."""
    return "".join(chr(b) if 0x20 <= b < 0x7F else "." for b in data[:MAX_TEXT])


def device_id_text(response: bytes) -> str | None:
    """The identification text in a valid response frame (address ... CRC), or None if it holds none."""
    if len(response) < 5:
        return None
    function = response[1]
    body = response[2:-2]
    if function == 0x11:
        # byte count, then server id, run indicator and additional data (MAP V1.1b3 p31)
        count = body[0]
        data = body[1:1 + count]
        return printable(data) if data else None
    if function == 0x2B and body[:1] == b"\x0e":
        # MEI type 0x0E, read code, conformity, more follows, next object id, number of objects, objects
        if len(body) < 6:
            return None
        n_objects = body[5]
        pos, parts = 6, []
        for _ in range(n_objects):
            if pos + 2 > len(body):
                break
            obj_id, length = body[pos], body[pos + 1]
            value = body[pos + 2:pos + 2 + length]
            pos += 2 + length
            name = DEVICE_ID_OBJECTS.get(obj_id, f"object 0x{obj_id:02X}")
            parts.append(f"{name}: {printable(value)}")
        text = "; ".join(parts)
        return text[:MAX_TEXT * 2] if text else None
    return None
