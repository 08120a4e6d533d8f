"""Profibus DP on its data link layer (FDL) behind the protocol seam.

Parts: :mod:`.fdl` (telegram layout, fields, check sum), :mod:`.scanner` (framing from
delimiters, lengths and FCS, with resync), :mod:`.pairing` (requests and answers per master).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from buswitness.decode.events import Frame
from buswitness.decode.protocols.base import DamageText, LineTiming
from buswitness.decode.protocols.profibus_dp.fdl import SC, SD4, START_DELIMITERS, parse
from buswitness.decode.protocols.profibus_dp.figures import ProfibusFigures
from buswitness.decode.protocols.profibus_dp.pairing import FdlPairing
from buswitness.decode.protocols.profibus_dp.scanner import FdlScanner, explained_fraction, split_telegrams
from buswitness.serial import SerialFormat

#: Synchronisation time: the idle the line holds before every request, 33 bit times (from memory).
SYNC_BITS = 33
#: A slot time the master waits for the first character of an answer; a typical setting at
#: 1.5 Mbit/s is 300 bit times (from memory); the pairing does not time out on it (the analysis judges).
SLOT_BITS = 300


class FdlFrame(Frame):
    """A telegram as a decoder frame: ``address`` is the station it concerns (DA of a request or
    token, SA of an answer; 255 for a short acknowledgement), ``function`` the FC byte (the
    start delimiter for a token or a short acknowledgement)."""

    def __post_init__(self) -> None:
        if not self.raw:
            raise ValueError("a telegram has at least one byte")
        if self.t_end_lo_ns > self.t_end_hi_ns:
            raise ValueError("frame end interval is reversed")

    @property
    def address(self) -> int:
        t = parse(self.raw)
        if t is None or t.sd == SC:
            return 255
        return t.da if t.kind in ("request", "token") else t.sa

    @property
    def function(self) -> int:
        t = parse(self.raw)
        if t is None or t.fc < 0:
            return self.raw[0]
        return t.fc


class ProfibusDp:
    name = "profibus-dp"
    label = "Profibus DP"
    marks_bytes = False
    station_label = "slave"
    bulk = None
    #: Only the token holder asks and it waits for its answer: what the wire shows is what the master
    #: accepted, so answers are not judged against an inferred timeout.
    answers_judged_on_the_wire = True
    #: Rates ``detect`` tries (from memory: the DP rates from 9.6 kbit/s; adapters reach about 3 Mbit/s).
    baud_rates = (9600, 19200, 45450, 93750, 187500, 500000, 1500000, 3000000)
    formats = ("8E1",)
    split = staticmethod(split_telegrams)

    @staticmethod
    def new_figures(fmt: SerialFormat, target_rotation_ms: float | None = None) -> ProfibusFigures:
        return ProfibusFigures(1e9 / fmt.baud, target_rotation_ms)

    @staticmethod
    def timing(fmt: SerialFormat) -> LineTiming:
        bit = 1e9 / fmt.baud
        return LineTiming(fmt.char_time_s * 1e9, SYNC_BITS * bit, SYNC_BITS * bit, True)

    @staticmethod
    def new_scanner(one_way: int) -> FdlScanner:
        return FdlScanner()

    @staticmethod
    def new_pairing(timing: LineTiming, timed: bool) -> FdlPairing:
        bit = timing.char_ns / 11
        return FdlPairing(SLOT_BITS * bit, timed)

    @staticmethod
    def unwrap(wire: bytes) -> tuple[bytes, int]:
        return wire, 0

    @staticmethod
    def make_frame(port: int, raw: bytes, lo: int, hi: int, char_ns: float, direction: str = "unknown",
                   wire: int = 0) -> FdlFrame:
        return FdlFrame(port, raw, lo, hi, char_ns, direction, wire)

    @staticmethod
    def describe_damage(raw: bytes, at_boundary: bool) -> DamageText:
        n = len(raw)
        if raw[0] in START_DELIMITERS and raw[0] not in (SC, SD4) and n >= 4:
            return DamageText("crc_error", -1, f"{n} bytes starting like a telegram (0x{raw[0]:02X}), "
                                               f"end delimiter or check sum wrong, or cut short")
        return DamageText("stray_bytes", -1, f"{n} stray byte{'s' if n != 1 else ''} that form no telegram")

    @staticmethod
    def describe_idle(raw: bytes, follows: tuple[int, bool], marked: bool) -> DamageText:
        return DamageText("stray_bytes", -1, "1 stray byte that forms no telegram")

    @staticmethod
    def frame_fields(raw: bytes) -> tuple[int, int, int]:
        t = parse(raw)
        if t is None:
            return -1, -1, -1
        return t.sa, t.da, t.fc

    explained_fraction = staticmethod(explained_fraction)

    @staticmethod
    def frame_fields_columns(frames: pd.DataFrame) -> dict:
        tels = [parse(r) for r in frames["raw"]]
        return {"source": np.array([t.sa for t in tels], np.int16),
                "destination": np.array([t.da for t in tels], np.int16),
                "service": [t.service for t in tels]}

    @staticmethod
    def transaction_fields_columns(tx: pd.DataFrame) -> dict:
        reqs = [parse(r) for r in tx["request_raw"]]
        result = []
        for raw in tx["response_raw"]:
            t = parse(raw) if raw else None
            result.append(-1 if t is None else 0 if t.kind == "ack" else t.function)
        return {"source": np.array([t.sa for t in reqs], np.int16),
                "destination": np.array([t.da for t in reqs], np.int16),
                "service": [t.service for t in reqs], "result_code": np.array(result, np.int16)}


PROTOCOL = ProfibusDp()
