"""Decode: pure logic from (port, timestamp, bytes) records to frames, damage events and transactions."""

from typing import Any

from buswitness.decode.bulk import frame_only
from buswitness.decode.crc import append_crc, crc16_modbus, crc16_rows, crc_ok, lrc
from buswitness.decode.events import Damage, Frame, Transaction
from buswitness.decode.framer import explained_fraction, split_frames
from buswitness.decode.functions import decode_fields, exception_name, function_name
from buswitness.decode.timing import COMMON_BAUD_RATES, SerialFormat, parse_baud

# The facade needs the capture format, which itself needs decode.timing: load it on first use
# so that importing the capture package first does not go round in a circle.
_LAZY = {"Decoder", "DecoderConfig", "DecodeOutput", "decode_source"}


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        from buswitness.decode import decoder

        return getattr(decoder, name)
    raise AttributeError(f"module 'buswitness.decode' has no attribute {name!r}")


__all__ = ["COMMON_BAUD_RATES", "Damage", "DecodeOutput", "Decoder", "DecoderConfig", "Frame", "SerialFormat",
           "Transaction", "append_crc", "crc16_modbus", "crc16_rows", "crc_ok", "decode_fields", "decode_source",
           "exception_name", "explained_fraction", "frame_only", "function_name", "lrc", "parse_baud", "split_frames"]
