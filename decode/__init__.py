"""Decode: pure logic from (port, timestamp, bytes) records to frames, damage events and transactions."""

from buswitness.decode.crc import append_crc, crc16_modbus, crc16_rows, crc_ok, lrc
from buswitness.decode.framer import explained_fraction, split_frames
from buswitness.decode.timing import COMMON_BAUD_RATES, SerialFormat, parse_baud

__all__ = ["COMMON_BAUD_RATES", "SerialFormat", "append_crc", "crc16_modbus", "crc16_rows", "crc_ok",
           "explained_fraction", "lrc", "parse_baud", "split_frames"]
