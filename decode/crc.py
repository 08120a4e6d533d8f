"""CRC-16/MODBUS for RTU frames and the LRC for ASCII frames.

Single frames use crcmod's predefined ``modbus`` CRC (a C extension). Many frames of one
length are checked at once with :func:`crc16_rows`, a table-driven numpy version of the
same algorithm, so the bulk path of the framer never loops over frames in Python.
"""

from __future__ import annotations

import crcmod.predefined
import numpy as np

#: crcmod's catalogue entry: poly 0x18005 reflected, init 0xFFFF, no final XOR.
crc16_modbus = crcmod.predefined.mkPredefinedCrcFun("modbus")


def _make_table() -> np.ndarray:
    table = np.zeros(256, dtype=np.uint16)
    for byte in range(256):
        crc = byte
        for _ in range(8):
            crc = (crc >> 1) ^ 0xA001 if crc & 1 else crc >> 1
        table[byte] = crc
    return table


#: Byte-wise lookup table of the reflected polynomial 0xA001.
CRC_TABLE = _make_table()


def append_crc(frame_without_crc: bytes) -> bytes:
    """Return the frame with its CRC appended, low byte first as RTU sends it."""
    crc = crc16_modbus(frame_without_crc)
    return bytes(frame_without_crc) + bytes((crc & 0xFF, crc >> 8))


def crc_ok(frame: bytes) -> bool:
    """True when the last two bytes are the CRC of the rest (an RTU frame of 4 bytes or more)."""
    if len(frame) < 4:
        return False
    # CRC-16/MODBUS has residue 0: running it over the frame and its CRC gives 0.
    return crc16_modbus(frame) == 0


def crc16_rows(rows: np.ndarray) -> np.ndarray:
    """CRC-16/MODBUS of every row of a 2-D ``uint8`` array (one frame per row, equal lengths)."""
    rows = np.asarray(rows, dtype=np.uint8)
    if rows.ndim != 2:
        raise ValueError("crc16_rows needs a 2-D array of frames of equal length")
    crc = np.full(rows.shape[0], 0xFFFF, dtype=np.uint16)
    for col in range(rows.shape[1]):
        crc = CRC_TABLE[(crc ^ rows[:, col]) & 0xFF] ^ (crc >> 8)
    return crc


def lrc(data: bytes) -> int:
    """Modbus ASCII LRC: two's complement of the byte sum, modulo 256."""
    return (-sum(data)) & 0xFF
