"""Modbus ASCII behind the protocol seam: ':' hex characters LRC CR LF, framed by its delimiters."""

from __future__ import annotations

from buswitness.decode.ascii import AsciiBulk, AsciiScanner, decode_ascii_frame
from buswitness.decode.pairing import Pairing
from buswitness.decode.protocols.base import DamageText, LineTiming, NoMarks
from buswitness.decode.protocols.modbus_rtu import (
    describe_damage,
    describe_idle,
    frame_fields_columns,
    transaction_fields_columns,
)
from buswitness.decode.timing import t15_s, t35_s
from buswitness.serial import SerialFormat


class _Scanner(NoMarks, AsciiScanner):
    def scan(self, buf, end, final, out, frames=None) -> None:  # noqa: ANN001
        AsciiScanner.scan(self, buf, end, final, out, frames)


class ModbusAscii:
    name = "modbus-ascii"
    label = "Modbus ASCII"
    marks_bytes = False
    station_label = "station"
    bulk = AsciiBulk()  # columns over runs of back-to-back valid frames (raws decoded, lengths on the wire)

    @staticmethod
    def timing(fmt: SerialFormat) -> LineTiming:
        # silences do not cut ASCII frames (pauses up to 1 s are allowed between characters)
        return LineTiming(fmt.char_time_s * 1e9, t15_s(fmt) * 1e9, t35_s(fmt) * 1e9, False)

    @staticmethod
    def new_scanner(one_way: int) -> _Scanner:
        return _Scanner()

    @staticmethod
    def new_pairing(timing: LineTiming, timed: bool) -> Pairing:
        return Pairing(timing.frame_gap_ns, timed=timed)

    @staticmethod
    def unwrap(wire: bytes) -> tuple[bytes, int]:
        """The frame's bytes from its hex characters, and how many characters it took on the wire."""
        return decode_ascii_frame(wire) or wire, len(wire)

    @staticmethod
    def describe_damage(raw: bytes, at_boundary: bool) -> DamageText:
        return describe_damage(raw, at_boundary)

    describe_idle = staticmethod(describe_idle)
    frame_fields_columns = staticmethod(frame_fields_columns)
    transaction_fields_columns = staticmethod(transaction_fields_columns)

    @staticmethod
    def frame_fields(raw: bytes) -> tuple[int, int, int]:
        return raw[0], raw[0], raw[1]


PROTOCOL = ModbusAscii()
