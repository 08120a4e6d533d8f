"""Modbus RTU behind the protocol seam: binary frames with CRC-16, framed by lengths and CRC.

The parts live where they always did (``decode/framer.py``, ``decode/bulk.py``,
``decode/lengths.py``, ``decode/pairing.py``); this module is the one place that hands them
to the decoder core.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from buswitness.decode.bulk import BulkWalk, bulk_spans
from buswitness.decode.framer import RegionScanner, explained_fraction, split_frames
from buswitness.decode.functions import function_name
from buswitness.decode.lengths import EITHER, MIN_FRAME, PUBLIC_CODES, candidate_lengths
from buswitness.decode.pairing import Pairing
from buswitness.decode.protocols.base import DamageText, LineTiming
from buswitness.decode.timing import t15_s, t35_s
from buswitness.serial import SerialFormat


def describe_damage(raw: bytes, at_boundary: bool) -> DamageText:
    """Kind, likely station and a sentence for a run of bytes that forms no valid frame."""
    n = len(raw)
    fc = raw[1] if n >= 2 else -1
    shaped = n >= 2 and raw[0] <= 247 and (fc in PUBLIC_CODES or (fc & 0x80 and (fc & 0x7F) in PUBLIC_CODES))
    if shaped:
        rules = [length for length, _ in candidate_lengths(raw, 0, n) if length]
        if at_boundary and rules and max(rules) > n:
            return DamageText("truncated", raw[0], f"a frame from or to station {raw[0]} cut short after {n} bytes "
                                                   f"(expected {max(rules)})")
        if n >= MIN_FRAME:
            return DamageText("crc_error", raw[0],
                              f"{n} bytes shaped like a frame for station {raw[0]}, CRC check failed")
    return DamageText("stray_bytes", -1, f"{n} stray byte{'s' if n != 1 else ''} that form no frame")


def describe_idle(raw: bytes, follows: tuple[int, bool], marked: bool) -> DamageText:
    """Kind, talker and a sentence for a byte a driver left on a line nobody holds idle.

    The talker is the station whose answer the byte follows, or -1 for the master (it has no
    address) when the byte follows a request.
    """
    address, request = follows
    after = f"the master's frame to station {address}" if request else f"station {address}'s answer"
    how = ", marked bad by the UART" if marked else ""
    if marked and not raw[0]:
        how = ", marked bad by the UART (PARMRK reports it as a break: both have one escape)"
    return DamageText("idle_line_byte", -1 if request else address, (
        f"byte 0x{raw[0]:02X}{how} right after {after}: the line floated when the driver let go "
        f"(not part of the frame)"))


class RtuBulk:
    """The columnar framing path over long flag-free runs (decode/bulk.py)."""

    @staticmethod
    def spans(buf: bytes, arr: np.ndarray, pos: int, end: int, expect_response: bool, one_way: int):
        starts, lens, shapes, expect = bulk_spans(buf, arr, pos, end, expect_response, one_way)
        return starts, lens, shapes, expect, arr[starts] if starts.size else arr[:0], \
            arr[starts + 1] if starts.size else arr[:0]

    @staticmethod
    def walker(buf: bytes, arr: np.ndarray, end: int, one_way: int):
        """One buffer's bulk walk, kept for the calls after the first (see BulkWalk)."""
        return _RtuWalk(buf, arr, end, one_way)

    @staticmethod
    def after_run(sc: RegionScanner, raws: list, shapes: np.ndarray, addrs: np.ndarray) -> None:
        """The scanner picks up where the walk stopped, knowing what the walk knew."""
        sc.anchored = True
        # the talker of a frame the length rules leave open is judged as the sequential framer
        # judges it (from the frame before), so both paths agree
        k = len(raws) - 1
        while k > max(0, len(raws) - 64) and int(shapes[k]) == EITHER:
            k -= 1
        for i in range(k, len(raws)):
            sc.note_frame(raws[i], int(shapes[i]))
        sc.known_addresses.update(np.unique(addrs).tolist())


class _RtuWalk(BulkWalk):
    def spans(self, pos: int, expect_response: bool):  # type: ignore[override]
        """What :meth:`RtuBulk.spans` returns, from the kept walk where it can."""
        starts, lens, shapes, expect = super().spans(pos, expect_response)
        arr = self.arr
        return starts, lens, shapes, expect, arr[starts] if starts.size else arr[:0], \
            arr[starts + 1] if starts.size else arr[:0]


_SERVICE = pd.CategoricalDtype([function_name(c) for c in range(256)])


def frame_fields_columns(frames: pd.DataFrame) -> dict:
    """Source and destination from the direction (the master has no address: -1), service from the function."""
    address = np.asarray(frames["address"]).astype(np.int16)
    direction = pd.Categorical(frames["direction"], categories=["request", "response", "unknown"])
    codes = direction.codes
    req, rsp = codes == 0, codes == 1
    return {"source": np.where(rsp, address, -1).astype(np.int16),
            "destination": np.where(req, address, -1).astype(np.int16),
            "service": pd.Categorical.from_codes(np.asarray(frames["function"]).astype(np.int16), dtype=_SERVICE, validate=False)}


def transaction_fields_columns(tx: pd.DataFrame) -> dict:
    """The master (-1) asks the station; the service is the function, the result code the exception code."""
    station = np.asarray(tx["station"]).astype(np.int16)
    return {"source": np.full(station.shape[0], -1, np.int16), "destination": station,
            "service": pd.Categorical.from_codes(np.asarray(tx["function"]).astype(np.int16), dtype=_SERVICE, validate=False),
            "result_code": np.asarray(tx["exception_code"]).astype(np.int16)}


class ModbusRtu:
    name = "modbus-rtu"
    label = "Modbus RTU"
    marks_bytes = True
    station_label = "station"
    bulk = RtuBulk()

    @staticmethod
    def timing(fmt: SerialFormat) -> LineTiming:
        return LineTiming(fmt.char_time_s * 1e9, t15_s(fmt) * 1e9, t35_s(fmt) * 1e9, True)

    @staticmethod
    def new_scanner(one_way: int) -> RegionScanner:
        sc = RegionScanner()
        sc.one_way = one_way
        return sc

    @staticmethod
    def new_pairing(timing: LineTiming, timed: bool) -> Pairing:
        return Pairing(timing.frame_gap_ns, timed=timed)

    @staticmethod
    def unwrap(wire: bytes) -> tuple[bytes, int]:
        return wire, 0

    describe_damage = staticmethod(describe_damage)
    describe_idle = staticmethod(describe_idle)
    frame_fields_columns = staticmethod(frame_fields_columns)
    transaction_fields_columns = staticmethod(transaction_fields_columns)
    split = staticmethod(split_frames)
    explained_fraction = staticmethod(explained_fraction)

    @staticmethod
    def frame_fields(raw: bytes) -> tuple[int, int, int]:
        """Source, destination and function of a frame seen alone (the direction decides which is which)."""
        return raw[0], raw[0], raw[1]


PROTOCOL = ModbusRtu()
