"""Builders for decoder-shaped tables (docs/tables.md) used by the analysis tests; no tests here.

Outside check values carry their source inline (source: the MAP/MSL specifications,
TIMING.md or termios(3), as cited beside each).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from buswitness.capture.fileformat import CaptureHeader, PortInfo
from buswitness.decode.crc import append_crc
from buswitness.decode.timing import SerialFormat

T0 = 5_000_000_000_000  # an arbitrary monotonic start, ns
SERIAL = SerialFormat(19200, 8, "E", 1)
CHAR_NS = SERIAL.char_time_s * 1e9


def header(start_utc: str = "2026-03-04T21:00:00+00:00") -> CaptureHeader:
    return CaptureHeader(serial=SERIAL, ports=[PortInfo(0, "ttyUSB0", 1.0, "user")], start_utc=start_utc,
                         start_monotonic_ns=T0, source="simulate", capture_id="fixture")


def read_request(station: int, register: int = 0, count: int = 2) -> bytes:
    # FC 03 read holding registers request: addr fc start(2) count(2) crc (MAP V1.1b3 p15)
    return append_crc(bytes([station, 3, register >> 8, register & 0xFF, count >> 8, count & 0xFF]))


def read_response(station: int, count: int = 2) -> bytes:
    return append_crc(bytes([station, 3, 2 * count]) + bytes(2 * count))


def exception_response(station: int, function: int, code: int) -> bytes:
    return append_crc(bytes([station, function | 0x80, code]))


def report_id_response(station: int, text: bytes) -> bytes:
    # FC 11 report server ID: addr 0x11 byte-count id... run-indicator (MAP V1.1b3 p31)
    body = text + b"\xff"
    return append_crc(bytes([station, 0x11, len(body)]) + body)


@dataclass
class Tx:
    t_s: float
    station: int
    outcome: str = "ok"
    response_ms: float = float("nan")
    halfwidth_ms: float = 1.0
    function: int = 3
    exception_code: int = 0
    retry: bool = False
    request: bytes = b""
    response: bytes = b""


@dataclass
class Output:
    frames: pd.DataFrame
    transactions: pd.DataFrame
    events: pd.DataFrame


def tables(txs: list[Tx], events: list[tuple[float, str, int, bytes]] = ()) -> Output:
    """Transactions, their frames, and events (t_s, kind, station, raw) as the decoder would give them."""
    frame_rows, tx_rows = [], []
    for t in txs:
        req = t.request or (read_request(t.station) if t.function == 3 else append_crc(bytes([t.station, t.function])))
        has_resp = t.outcome in ("ok", "exception", "late", "corrupt") and not np.isnan(t.response_ms)
        resp = t.response
        if has_resp and not resp:
            resp = (exception_response(t.station, t.function, t.exception_code) if t.outcome == "exception"
                    else read_response(t.station))
        t_end = T0 + int(t.t_s * 1e9)
        frame_rows.append({"t_start_ns": t_end - int(len(req) * CHAR_NS), "t_end_ns": t_end,
                               "t_end_lo_ns": t_end - 1_000_000, "t_end_hi_ns": t_end, "port": 0, "address": t.station,
                               "function": req[1], "length": len(req), "direction": "request", "raw": req})
        t_resp = -1
        if has_resp:
            t_resp = t_end + int(t.response_ms * 1e6)
            frame_rows.append({"t_start_ns": t_resp, "t_end_ns": t_resp + int(len(resp) * CHAR_NS),
                                   "t_end_lo_ns": t_resp, "t_end_hi_ns": t_resp + int(len(resp) * CHAR_NS), "port": 0,
                                   "address": t.station, "function": resp[1], "length": len(resp), "direction": "response",
                                   "raw": resp})
        rt = t.response_ms if has_resp else float("nan")
        tx_rows.append({"t_request_end_ns": t_end, "t_response_start_ns": t_resp, "station": t.station,
                            "function": t.function, "outcome": t.outcome, "exception_code": t.exception_code,
                            "retry": t.retry, "response_ms": rt, "response_ms_low": rt - t.halfwidth_ms,
                            "response_ms_high": rt + t.halfwidth_ms, "request_raw": req,
                            "response_raw": resp if has_resp else b""})
    ev_rows = [{"t_ns": T0 + int(t * 1e9), "kind": k, "station": s, "port": 0, "raw": r, "detail": f"{k} fixture"}
               for t, k, s, r in events]
    frames = pd.DataFrame(frame_rows, columns=["t_start_ns", "t_end_ns", "t_end_lo_ns", "t_end_hi_ns", "port",
                                               "address", "function", "length", "direction", "raw"])
    tx = pd.DataFrame(tx_rows, columns=["t_request_end_ns", "t_response_start_ns", "station", "function", "outcome",
                                        "exception_code", "retry", "response_ms", "response_ms_low",
                                        "response_ms_high", "request_raw", "response_raw"])
    ev = pd.DataFrame(ev_rows, columns=["t_ns", "kind", "station", "port", "raw", "detail"])
    if frame_rows:
        frames = frames.astype({c: "int64" for c in ("t_start_ns", "t_end_ns", "t_end_lo_ns", "t_end_hi_ns", "length")})
    return Output(frames, tx, ev)


def night(seed: int = 1, minutes: int = 30, late_station: int = 7, timeout_ms: float = 200.0) -> list[Output]:
    """A small night: stations 1, 2 and ``late_station`` polled in turn every 0.5 s, the latter slow."""
    rng = np.random.default_rng(seed)
    txs = []
    t = 0.1
    while t < minutes * 60:
        for st in (1, 2, late_station):
            if st == late_station:
                rt = float(rng.uniform(150, 260))
                if rt > timeout_ms + 40:
                    txs.append(Tx(t, st, "timeout"))
                    t += timeout_ms / 1000 + 0.02
                    continue
                txs.append(Tx(t, st, "late" if rt > timeout_ms else "ok", rt))
            else:
                txs.append(Tx(t, st, "ok", float(rng.uniform(8, 15))))
            t += 0.5 / 3
    chunks = [txs[i:i + 1000] for i in range(0, len(txs), 1000)]
    return [tables(c) for c in chunks]
