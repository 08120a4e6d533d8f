"""Serial character format: baud rate, data bits, parity, stop bits, and the character time.

A character on the wire is a start bit, the data bits, an optional parity bit and the stop
bits. Its duration (the character time ``c``) is what every protocol's intervals are built
from; the intervals themselves (Modbus's t1.5 and t3.5, Profibus's idle and slot times)
belong to the protocols (``buswitness.decode.protocols``), not here.

The format kept here is the *bus's* format (for example 8E1), which is not always the
format the host port was opened with: a pseudo-terminal in tests is opened 8N1.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from buswitness.errors import SerialFormatError

PARITIES = {"N": "none", "E": "even", "O": "odd", "M": "mark", "S": "space"}

#: Rates the trade uses on RS-485 (common practice); ``detect`` tries these.
COMMON_BAUD_RATES = (1200, 2400, 4800, 9600, 19200, 38400, 57600, 115200)

_SHORT_FORM = re.compile(r"^\s*([5-8])\s*([NEOMSneoms])\s*(1|1\.5|2)\s*$")


@dataclass(frozen=True)
class SerialFormat:
    """Baud rate and character format of a serial line, e.g. ``SerialFormat(19200, 8, "E", 1)``."""

    baud: int = 19200
    data_bits: int = 8
    parity: str = "E"
    stop_bits: float = 1

    def __post_init__(self) -> None:
        if not isinstance(self.baud, int) or isinstance(self.baud, bool) or not 50 <= self.baud <= 12_000_000:
            raise SerialFormatError(
                f"baud rate {self.baud!r} is not a usable serial rate (expected a whole number from 50 to "
                f"12000000, e.g. 9600 or 19200)"
            )
        if self.data_bits not in (5, 6, 7, 8):
            raise SerialFormatError(f"{self.data_bits!r} data bits is not a serial character size (5 to 8)")
        if self.parity not in PARITIES:
            raise SerialFormatError(
                f"parity {self.parity!r} is not one of N (none), E (even), O (odd), M (mark), S (space)"
            )
        if self.stop_bits not in (1, 1.5, 2):
            raise SerialFormatError(f"{self.stop_bits!r} stop bits is not possible (1, 1.5 or 2)")

    @classmethod
    def parse(cls, short_form: str, baud: int = 19200) -> SerialFormat:
        """Parse the usual short form (``8E1``, ``8N2``, ``7E1``) at the given baud rate."""
        match = _SHORT_FORM.match(short_form or "")
        if not match:
            raise SerialFormatError(
                f"character format {short_form!r} is not understood: write data bits, parity and stop bits, "
                f"e.g. 8E1 (Modbus RTU default), 8N2 or 8N1"
            )
        data, parity, stop = match.groups()
        stop_bits: float = 1.5 if stop == "1.5" else int(stop)
        return cls(baud=int(baud), data_bits=int(data), parity=parity.upper(), stop_bits=stop_bits)

    @property
    def short_form(self) -> str:
        """The format as ``8E1``; the baud rate is not part of it."""
        stop = "1.5" if self.stop_bits == 1.5 else str(int(self.stop_bits))
        return f"{self.data_bits}{self.parity}{stop}"

    def __str__(self) -> str:
        return f"{self.baud} {self.short_form}"

    @property
    def bits_per_char(self) -> float:
        """Bits on the wire per character: start + data + parity + stop."""
        return 1 + self.data_bits + (0 if self.parity == "N" else 1) + self.stop_bits

    @property
    def char_time_s(self) -> float:
        """Duration of one character on the wire, in seconds."""
        return self.bits_per_char / self.baud

    @property
    def bit_time_s(self) -> float:
        return 1.0 / self.baud

    def frame_time_s(self, n_bytes: int) -> float:
        """Time the line is busy carrying ``n_bytes`` back-to-back characters."""
        return n_bytes * self.char_time_s

    def to_dict(self) -> dict:
        return {"baud": self.baud, "format": self.short_form}

    @classmethod
    def from_dict(cls, data: dict) -> SerialFormat:
        return cls.parse(str(data.get("format", "8E1")), int(data.get("baud", 19200)))

    def overridden(self, baud: int | None = None, short_form: str | None = None) -> SerialFormat:
        """This setting with the baud rate and/or the character format replaced, each half on its own.

        ``--format 8N2`` on a 9600 capture keeps 9600; ``--baud`` alone keeps the format.
        """
        if baud is None and short_form is None:
            return self
        return SerialFormat.parse(short_form or self.short_form, self.baud if baud is None else baud)


def parse_baud(text: str | int) -> int:
    """Turn ``"19200"`` or ``19200`` into a checked baud rate."""
    try:
        baud = int(str(text).strip())
    except ValueError:
        raise SerialFormatError(f"baud rate {text!r} is not a number (e.g. 9600 or 19200)") from None
    SerialFormat(baud=baud)  # validates
    return baud
