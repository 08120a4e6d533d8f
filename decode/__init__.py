"""Decode: pure logic from (port, timestamp, bytes) records to frames, damage events and transactions."""

from buswitness.decode.bulk import frame_only
from buswitness.decode.crc import append_crc, crc16_modbus, crc16_rows, crc_ok, lrc
from buswitness.decode.decoder import DecodeOutput, Decoder, DecoderConfig, decode_source
from buswitness.decode.events import Damage, Frame, Transaction
from buswitness.decode.framer import explained_fraction, split_frames
from buswitness.decode.functions import decode_fields, exception_name, function_name
from buswitness.decode.timing import COMMON_BAUD_RATES, SerialFormat, parse_baud

__all__ = ["COMMON_BAUD_RATES", "Damage", "DecodeOutput", "Decoder", "DecoderConfig", "Frame", "SerialFormat",
           "Transaction", "append_crc", "crc16_modbus", "crc16_rows", "crc_ok", "decode_fields", "decode_source",
           "exception_name", "explained_fraction", "frame_only", "function_name", "lrc", "parse_baud", "split_frames"]
