"""Profibus FDL telegrams (IEC 61158 / EN 50170 data link layer): their layout and fields, no I/O.

Layout (facts from memory, cross-checked against an independent implementation, the
``pyprofibus`` package 1.13, ``pyprofibus/fdl.py`` and ``pyprofibus/dp.py``; the tests build
telegrams with it)::

    SD1  0x10 DA SA FC FCS 0x16                           fixed length, no data (6 bytes)
    SD2  0x68 LE LEr 0x68 DA SA FC [DAE] [SAE] DU FCS 0x16 variable length; LE = 3 + len(ext + DU), 4..249
    SD3  0xA2 DA SA FC DU(8) FCS 0x16                     fixed length, 8 data bytes (14 bytes)
    SD4  0xDC DA SA                                       the token (3 bytes)
    SC   0xE5                                             short acknowledgement (1 byte)

FCS is the sum modulo 256 of DA..DU (from DA to the last data byte). DA/SA bit 7 set: an
address extension byte follows at the start of the data unit (DAE before SAE); in an
extension byte bit 7 says another one follows, bit 6 set marks a segment address, else its
low six bits are the service access point (SAP). Addresses 0-126, 127 is broadcast.

FC bit 6 set: a request (bits 0-3 the function, bit 5 FCB, bit 4 FCV); clear: a response
(bits 0-3 the status, bits 4-5 the station type). Characters are 11 bits (8E1).
"""

from __future__ import annotations

from dataclasses import dataclass

SD1, SD2, SD3, SD4, SC, ED = 0x10, 0x68, 0xA2, 0xDC, 0xE5, 0x16
START_DELIMITERS = frozenset({SD1, SD2, SD3, SD4, SC})
FIXED_LENGTH = {SD1: 6, SD3: 14, SD4: 3, SC: 1}
MAX_LE = 249
BROADCAST = 127
ADDRESS_EXT = 0x80

FC_REQUEST = 0x40
FC_FCB = 0x20
FC_FCV = 0x10

#: Request functions (FC bits 0-3 with bit 6 set).
REQUEST_FUNCTIONS = {
    0x00: "time_event", 0x03: "SDA_low", 0x04: "SDN_low", 0x05: "SDA_high", 0x06: "SDN_high",
    0x07: "DDB", 0x09: "FDL_status", 0x0A: "time_event_actual", 0x0B: "counter_event",
    0x0C: "SRD_low", 0x0D: "SRD_high", 0x0E: "ident", 0x0F: "LSAP_status",
}
#: Requests that expect no answer at all.
NO_ANSWER = frozenset({0x04, 0x06})
#: Response statuses (FC bits 0-3 with bit 6 clear).
RESPONSE_STATUS = {
    0x00: "OK", 0x01: "user_error", 0x02: "no_resource", 0x03: "no_service", 0x08: "data_low",
    0x09: "no_response_data", 0x0A: "data_high", 0x0C: "data_low_no_resource", 0x0D: "data_high_no_resource",
}
#: Statuses that are an acknowledgement with or without data (the rest are negative).
POSITIVE = frozenset({0x00, 0x08, 0x0A})
#: "data high": the station has high-priority data waiting (DP: a diagnosis to fetch).
HIGH_PRIORITY = frozenset({0x0A, 0x0D})

#: DP service access points (destination SAPs, from memory; the same numbers as pyprofibus/dp.py).
SAP_NAMES = {
    49: "resource_manager", 50: "alarm", 51: "server", 53: "ext_user_prm", 55: "set_slave_address",
    56: "read_inputs", 57: "read_outputs", 58: "global_control", 59: "get_config", 60: "slave_diag",
    61: "set_param", 62: "check_config",
}
SAP_DIAG, SAP_SET_PRM, SAP_CHK_CFG = 60, 61, 62


def fcs(body: bytes) -> int:
    """Frame check sequence: the arithmetic sum of the bytes modulo 256."""
    return sum(body) & 0xFF


@dataclass(frozen=True)
class Telegram:
    """One FDL telegram's fields."""

    sd: int
    da: int = -1          # destination address 0-127 (extension bit cleared); -1: none (SC)
    sa: int = -1          # source address
    fc: int = -1          # frame control byte; -1: none (SD4, SC)
    dsap: int = -1        # destination SAP from DAE; -1: none
    ssap: int = -1        # source SAP from SAE
    du: bytes = b""       # data unit without the address extensions
    dae: bytes = b""
    sae: bytes = b""

    @property
    def kind(self) -> str:
        """``request``, ``response``, ``token`` or ``ack``."""
        if self.sd == SD4:
            return "token"
        if self.sd == SC:
            return "ack"
        return "request" if self.fc & FC_REQUEST else "response"

    @property
    def function(self) -> int:
        """FC bits 0-3: the request function or the response status (-1 for SD4/SC)."""
        return self.fc & 0x0F if self.fc >= 0 else -1

    @property
    def fcb(self) -> int:
        return 1 if self.fc >= 0 and self.fc & FC_FCB else 0

    @property
    def fcv(self) -> int:
        return 1 if self.fc >= 0 and self.fc & FC_FCV else 0

    @property
    def service(self) -> str:
        """A label: ``SRD_high``, ``OK``, ``token``, ``ack``, with the SAP's name when there is one."""
        if self.kind in ("token", "ack"):
            return self.kind
        names = REQUEST_FUNCTIONS if self.kind == "request" else RESPONSE_STATUS
        base = names.get(self.function, f"fc_{self.function:X}")
        sap = self.dsap if self.kind == "request" else self.ssap
        return f"{base}:{SAP_NAMES.get(sap, sap)}" if sap >= 0 else base


def telegram_length(buf, p: int, end: int) -> int:
    """Length of the telegram starting at ``buf[p]``: > 0 known, 0 not a telegram start, -1 need more bytes."""
    sd = buf[p]
    n = FIXED_LENGTH.get(sd)
    if n is not None:
        return n
    if sd != SD2:
        return 0
    if end - p < 4:
        return -1
    le = buf[p + 1]
    if buf[p + 2] != le or buf[p + 3] != SD2 or not 3 <= le <= MAX_LE:
        return 0
    return le + 6


def check(buf, p: int, n: int) -> bool:
    """Whether the ``n`` bytes at ``p`` are a whole valid telegram (end delimiter, FCS, extensions)."""
    sd = buf[p]
    if sd == SC:
        return n == 1
    if sd == SD4:
        return n == 3 and buf[p + 1] & 0x7F <= BROADCAST and buf[p + 2] & 0x7F < BROADCAST
    if buf[p + n - 1] != ED:
        return False
    body_start = p + 4 if sd == SD2 else p + 1
    if fcs(bytes(buf[body_start:p + n - 2])) != buf[p + n - 2]:
        return False
    return parse(bytes(buf[p:p + n])) is not None


def _extension(du: bytes) -> tuple[bytes, bytes] | None:
    """(extension bytes, rest of the data unit), or None when the chain runs past the data."""
    for i, b in enumerate(du):
        if not b & 0x80:
            return du[:i + 1], du[i + 1:]
    return None


def _sap(ext: bytes) -> int:
    for b in ext:
        if not b & 0x40:
            return b & 0x3F
    return -1


def parse(raw: bytes) -> Telegram | None:
    """The fields of a whole telegram (delimiters and FCS already checked by :func:`check`), or None."""
    sd = raw[0]
    if sd == SC:
        return Telegram(SC)
    if sd == SD4:
        return Telegram(SD4, raw[1] & 0x7F, raw[2] & 0x7F)
    if sd == SD2:
        da, sa, fc, du = raw[4], raw[5], raw[6], raw[7:-2]
    else:
        da, sa, fc, du = raw[1], raw[2], raw[3], raw[4:-2]
    dae = sae = b""
    if da & ADDRESS_EXT:
        got = _extension(du)
        if got is None:
            return None
        dae, du = got
    if sa & ADDRESS_EXT:
        got = _extension(du)
        if got is None:
            return None
        sae, du = got
    if sd == SD3 and len(raw) != 14:
        return None
    return Telegram(sd, da & 0x7F, sa & 0x7F, fc, _sap(dae), _sap(sae), bytes(du), bytes(dae), bytes(sae))


def build(sd: int, da: int = 0, sa: int = 0, fc: int = 0, du: bytes = b"", dsap: int = -1, ssap: int = -1) -> bytes:
    """A telegram's bytes (for the simulator and tests); SAPs go into address extensions."""
    if sd == SC:
        return bytes([SC])
    if sd == SD4:
        return bytes([SD4, da, sa])
    dae = bytes([dsap]) if dsap >= 0 else b""
    sae = bytes([ssap]) if ssap >= 0 else b""
    body = bytes([da | (ADDRESS_EXT if dae else 0), sa | (ADDRESS_EXT if sae else 0), fc]) + dae + sae + du
    if sd == SD1:
        return bytes([SD1]) + body + bytes([fcs(body), ED])
    if sd == SD3:
        assert len(body) == 11, "SD3 carries exactly 8 data bytes"
        return bytes([SD3]) + body + bytes([fcs(body), ED])
    le = len(body)
    return bytes([SD2, le, le, SD2]) + body + bytes([fcs(body), ED])
