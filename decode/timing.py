"""Modbus serial-line silence intervals t1.5 and t3.5 from the serial character format.

t1.5 is the longest gap allowed inside a frame and t3.5 the shortest silence between
frames; both are multiples of the character time. Above 19200 baud the Modbus serial-line
specification recommends fixed values instead, because the computed ones become too short
for real UART timers. The character format itself lives on the ground floor
(:mod:`buswitness.serial`) and is re-exported here for older imports.
"""

from __future__ import annotations

from buswitness.serial import COMMON_BAUD_RATES, PARITIES, SerialFormat, parse_baud

#: Above this rate the specification's fixed timer values apply (MSL V1.02 p13, remark).
FIXED_TIMER_ABOVE_BAUD = 19200
FIXED_T15_S = 750e-6
FIXED_T35_S = 1.750e-3


def t15_s(fmt: SerialFormat) -> float:
    """Longest silence allowed between two characters of one Modbus RTU frame (t1.5)."""
    if fmt.baud > FIXED_TIMER_ABOVE_BAUD:
        return FIXED_T15_S
    return 1.5 * fmt.char_time_s


def t35_s(fmt: SerialFormat) -> float:
    """Shortest silence that separates two Modbus RTU frames (t3.5)."""
    if fmt.baud > FIXED_TIMER_ABOVE_BAUD:
        return FIXED_T35_S
    return 3.5 * fmt.char_time_s


__all__ = ["COMMON_BAUD_RATES", "FIXED_T15_S", "FIXED_T35_S", "FIXED_TIMER_ABOVE_BAUD", "PARITIES",
           "SerialFormat", "parse_baud", "t15_s", "t35_s"]
