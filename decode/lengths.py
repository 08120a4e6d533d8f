"""How long an RTU frame must be, from its function code and byte-count fields (MAP V1.1b3).

A frame is ``address, function, data, CRC(2)``. For most public function codes the length of
a request and of a response follows from the first few bytes; the framer tries exactly those
lengths, so a frame glued to the next one in a single read is cut at the right place. Codes
whose length is not fixed by their fields (FC08 "return query data", MEI types other than
0E, user-defined codes) are left to a CRC search by the framer.

Shapes: ``REQUEST`` and ``RESPONSE`` where only one direction can have that length, ``EITHER``
where both can (echo codes 05, 06, 08, 16 and the file-record codes).
"""

from __future__ import annotations

import numpy as np

REQUEST = 1
RESPONSE = 2
EITHER = 3

MIN_FRAME = 4
#: Largest RTU frame: address, 253-byte PDU, CRC (MSL V1.02 p13).
MAX_FRAME = 256

#: Codes with fields the decoder knows (MAP V1.1b3 section 6).
PUBLIC_CODES = frozenset({0x01, 0x02, 0x03, 0x04, 0x05, 0x06, 0x07, 0x08, 0x0B, 0x0C, 0x0F, 0x10, 0x11,
                          0x14, 0x15, 0x16, 0x17, 0x18, 0x2B})

#: FC08 sub-functions the specification defines (MAP V1.1b3 section 6.8).
DIAGNOSTIC_SUBFUNCTIONS = frozenset({0, 1, 2, 3, 4} | set(range(0x0A, 0x13)) | {0x14})

#: Codes whose length the CRC search must find (besides unknown codes).
SEARCH_CODES = frozenset({0x08, 0x2B})

# Vectorised rule table. For each function code: (request kind, request arg, response kind,
# response arg). Kinds: 0 none, 1 fixed length = arg, 2 byte count at offset arg plus header.
_NONE, _FIXED, _BC8, _BC16 = 0, 1, 2, 3
# For _BC8 / _BC16 the total is base + count, base given below per code.
_RULES: dict[int, tuple[tuple[int, int, int], tuple[int, int, int]]] = {
    # fc: ((kind, offset, base), (kind, offset, base)) for request and response
    0x01: ((_FIXED, 0, 8), (_BC8, 2, 5)),
    0x02: ((_FIXED, 0, 8), (_BC8, 2, 5)),
    0x03: ((_FIXED, 0, 8), (_BC8, 2, 5)),
    0x04: ((_FIXED, 0, 8), (_BC8, 2, 5)),
    0x05: ((_FIXED, 0, 8), (_FIXED, 0, 8)),
    0x06: ((_FIXED, 0, 8), (_FIXED, 0, 8)),
    0x07: ((_FIXED, 0, 4), (_FIXED, 0, 5)),
    0x08: ((_FIXED, 0, 8), (_FIXED, 0, 8)),
    0x0B: ((_FIXED, 0, 4), (_FIXED, 0, 8)),
    0x0C: ((_FIXED, 0, 4), (_BC8, 2, 5)),
    0x0F: ((_BC8, 6, 9), (_FIXED, 0, 8)),
    0x10: ((_BC8, 6, 9), (_FIXED, 0, 8)),
    0x11: ((_FIXED, 0, 4), (_BC8, 2, 5)),
    0x14: ((_BC8, 2, 5), (_BC8, 2, 5)),
    0x15: ((_BC8, 2, 5), (_BC8, 2, 5)),
    0x16: ((_FIXED, 0, 10), (_FIXED, 0, 10)),
    0x17: ((_BC8, 10, 13), (_BC8, 2, 5)),
    0x18: ((_FIXED, 0, 6), (_BC16, 2, 6)),
    0x2B: ((_FIXED, 0, 7), (_NONE, 0, 0)),
}


def _rule_length(rule: tuple[int, int, int], buf: bytes, p: int, end: int) -> int | None:
    """Length a rule gives for a frame at ``p``; None when the field is not yet in ``buf[:end]``."""
    kind, off, base = rule
    if kind == _FIXED:
        return base
    if kind == _BC8:
        if p + off >= end:
            return None
        return base + buf[p + off]
    if p + off + 1 >= end:
        return None
    return base + (buf[p + off] << 8 | buf[p + off + 1])


def _mei_0e_response_length(buf: bytes, p: int, end: int) -> int | None:
    """Length of an FC2B/0E (read device identification) response, walking its object list."""
    if p + 8 > end:
        return None
    count = buf[p + 7]
    pos = p + 8
    for _ in range(count):
        if pos + 2 > end:
            return None
        pos += 2 + buf[pos + 1]
        if pos - p + 2 > MAX_FRAME:
            return MAX_FRAME + 1
    return pos - p + 2


def candidate_lengths(buf: bytes, p: int, end: int) -> list[tuple[int | None, int]]:
    """The lengths (with shape) a frame starting at ``buf[p]`` may have under the rules.

    A length of None means the deciding field has not arrived yet. Exception responses are
    five bytes. An empty list means the code has no rule (unknown or user-defined).
    """
    fc = buf[p + 1]
    if fc & 0x80:
        return [(5, RESPONSE)]
    rules = _RULES.get(fc)
    if rules is None:
        return []
    req_rule, rsp_rule = rules
    if fc == 0x2B:
        if p + 2 >= end:
            return [(None, EITHER)]
        if buf[p + 2] != 0x0E:
            return []
        return [(7, REQUEST), (_mei_0e_response_length(buf, p, end), RESPONSE)]
    req = _rule_length(req_rule, buf, p, end)
    rsp = _rule_length(rsp_rule, buf, p, end)
    if req is not None and req == rsp:
        return [(req, EITHER)]
    return [(req, REQUEST), (rsp, RESPONSE)]


def _vector_rule(rule: tuple[int, int, int], buf: np.ndarray, pos: np.ndarray) -> np.ndarray:
    kind, off, base = rule
    if kind == _FIXED:
        return np.full(pos.shape, base, dtype=np.int64)
    if kind == _BC8:
        idx = np.minimum(pos + off, buf.shape[0] - 1)
        return base + buf[idx].astype(np.int64)
    if kind == _BC16:
        i0 = np.minimum(pos + off, buf.shape[0] - 1)
        i1 = np.minimum(pos + off + 1, buf.shape[0] - 1)
        return base + (buf[i0].astype(np.int64) << 8 | buf[i1].astype(np.int64))
    return np.zeros(pos.shape, dtype=np.int64)


def vector_lengths(buf: np.ndarray, pos: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Request-shape and response-shape lengths of frames starting at each of ``pos`` (0 = no rule).

    The bulk path's version of :func:`candidate_lengths`, over numpy arrays. Fields past the
    end of ``buf`` read as its last byte; the caller drops lengths that overrun the buffer.
    FC2B responses and codes without rules give 0 here and go to the sequential path.
    """
    fcs = buf[np.minimum(pos + 1, buf.shape[0] - 1)]
    req = np.zeros(pos.shape, dtype=np.int64)
    rsp = np.zeros(pos.shape, dtype=np.int64)
    exc = (fcs & 0x80) != 0
    rsp[exc] = 5
    for fc, (req_rule, rsp_rule) in _RULES.items():
        sel = np.flatnonzero(fcs == fc)
        if sel.size == 0:
            continue
        p = pos[sel]
        req[sel] = _vector_rule(req_rule, buf, p)
        rsp[sel] = _vector_rule(rsp_rule, buf, p)
    return req, rsp


def answer_length(request: bytes) -> int | None:
    """Length of the normal answer a request calls for, where its fields fix it (MAP V1.1b3 section 6).

    None where the answer's length depends on the device (report server ID, FIFO, file records,
    diagnostics other than sub-function 00) or the request is not one the table knows.
    """
    if len(request) < 4:
        return None
    fc = request[1]
    if fc in (0x05, 0x06, 0x0F, 0x10, 0x0B):
        return 8
    if fc == 0x07:
        return 5
    if fc == 0x16:
        return 10
    if fc == 0x08:
        return len(request) if request[2:4] == b"\x00\x00" else None  # "return query data" echoes
    if len(request) < 8:
        return None
    q = request[4] << 8 | request[5]
    if fc in (0x01, 0x02):
        return 5 + (q + 7) // 8
    if fc in (0x03, 0x04, 0x17):
        return 5 + 2 * q
    return None


def plausible(buf: bytes, p: int, length: int, shape: int) -> bool:
    """Do the fields of the CRC-valid frame ``buf[p:p+length]`` make sense (MAP V1.1b3 limits)?

    Used only for frames found inside damaged bytes from a station not yet seen: a CRC match
    there may be chance (1 in 65536), and sane fields make chance far less likely.
    """
    if buf[p] > 247:
        return False
    fc = buf[p + 1]
    if fc & 0x80:
        return (fc & 0x7F) in PUBLIC_CODES and buf[p + 2] in (1, 2, 3, 4, 5, 6, 8, 10, 11)
    if fc not in PUBLIC_CODES:
        return False
    q = buf[p + 4] << 8 | buf[p + 5] if length >= 8 else 0
    if fc in (0x01, 0x02):
        if shape == REQUEST:
            return 1 <= q <= 2000
        return buf[p + 2] >= 1
    if fc in (0x03, 0x04):
        if shape == REQUEST:
            return 1 <= q <= 125
        return buf[p + 2] >= 2 and buf[p + 2] % 2 == 0
    if fc == 0x05:
        return q in (0x0000, 0xFF00)
    if fc == 0x08:
        return (buf[p + 2] << 8 | buf[p + 3]) in DIAGNOSTIC_SUBFUNCTIONS
    if fc in (0x0F, 0x10):
        if shape == RESPONSE:
            return 1 <= q <= (1968 if fc == 0x0F else 123)
        count = buf[p + 6]
        return count == ((q + 7) // 8 if fc == 0x0F else 2 * q)
    if fc in (0x14, 0x15):
        return 0x07 <= buf[p + 2] <= 0xFB
    if fc == 0x17:
        if shape == RESPONSE:
            return buf[p + 2] >= 2 and buf[p + 2] % 2 == 0
        read_q, write_q = q, buf[p + 8] << 8 | buf[p + 9]
        return 1 <= read_q <= 125 and 1 <= write_q <= 121 and buf[p + 10] == 2 * write_q
    if fc == 0x18 and shape == RESPONSE:
        count = buf[p + 4] << 8 | buf[p + 5]
        return count <= 31 and (buf[p + 2] << 8 | buf[p + 3]) == 2 + 2 * count
    return True
