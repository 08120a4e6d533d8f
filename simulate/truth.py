"""Ground truth of a simulation: every frame on the wire, every transaction, every injected event.

Built slice by slice while the simulation runs. Per-station figures are accumulated as it
goes (so a 24-hour run needs no frame table); the frame and transaction tables are kept
only when asked (``keep_tables``). The JSON form is columnar and described in
``docs/truth-format.md``.
"""

from __future__ import annotations

import json
import math
import os
from pathlib import Path

import numpy as np
import pandas as pd
from buswitness.decode.crc import crc16_modbus
from buswitness.errors import OutputError
from buswitness.simulate.bus import FRAME_KINDS, MASTER, OUTCOMES, WireSlice
from buswitness.simulate.line import merge_intervals
from buswitness.simulate.sniffer import SliceReception

TRUTH_FORMAT = "buswitness-truth"
TRUTH_VERSION = 1

FRAME_COLUMNS = ["t_first_bit_ns", "t_last_bit_ns", "talker", "station", "kind", "transaction", "raw", "received",
                 "corrupted", "collided", "noisy", "crc_ok", "line_errors", "gap_after_byte", "idle_byte_after"]
TRANSACTION_COLUMNS = ["transaction", "t_request_start_ns", "t_request_end_ns", "t_response_start_ns",
                       "t_response_end_ns", "station", "function", "outcome", "exception_code", "retry",
                       "response_ms", "response_ms_low", "response_ms_high", "request_corrupted", "request_raw",
                       "response_raw", "responder", "attempt", "retry_of", "master_answer"]
#: In the file the interval columns are left out: truth is exact, so they equal response_ms.
_JSON_TRANSACTION_COLUMNS = [c for c in TRANSACTION_COLUMNS if c not in ("response_ms_low", "response_ms_high")]
EVENT_COLUMNS = ["t_start_ns", "t_end_ns", "kind", "station", "detail"]
_BYTES_COLUMNS = {"raw", "received", "request_raw", "response_raw"}


def _crc_good(frame: bytes) -> bool:
    return len(frame) >= 4 and crc16_modbus(frame) == 0


class Truth:
    """What really happened on the simulated bus.

    ``frames``, ``transactions`` and ``events`` are pandas DataFrames (columns in
    ``docs/truth-format.md``); ``stations`` maps each address to its summary figures;
    ``bus`` holds the bus-level figures; ``to_json(path)`` writes it all.
    """

    def __init__(self, meta: dict, station_names: dict[int, str], keep_tables: bool = True) -> None:
        self.meta = meta
        self.keep_tables = keep_tables
        self._names = station_names
        self._frames: list[pd.DataFrame] = []
        self._txns: list[pd.DataFrame] = []
        self._frames_df: pd.DataFrame | None = None
        self._txns_df: pd.DataFrame | None = None
        self.events = pd.DataFrame({c: [] for c in EVENT_COLUMNS})
        self._counts: dict[str, np.ndarray] = {k: np.zeros(256, np.int64) for k in
                                               ("requests", "requests_corrupted", "retries", "crc_errors", "collisions",
                                                "frames_sent", "idle_line_bytes", "master_took_earlier")
                                               + OUTCOMES}
        self._exc = np.zeros((256, 256), np.int64)
        self._rt: dict[int, list[np.ndarray]] = {}
        self._busy_ns = 0.0
        self._n_frames = 0
        self._n_bytes = 0
        self._stray = 0
        self._idle_master = 0
        self._t_first: int | None = None
        self._t_last: int | None = None
        self.stations: dict[int, dict] = {}
        self.bus: dict = {}

    # -- building ----------------------------------------------------------------------------
    def add_slice(self, ws: WireSlice, rec: SliceReception, sniffer_matches_bus: bool) -> None:
        """Take in one slice of frames and transactions."""
        order = rec.order
        n = len(order)
        if n:
            start = np.asarray(ws.f_start, dtype=np.int64)[order]
            end = np.asarray(ws.f_end, dtype=np.int64)[order]
            talker = np.asarray(ws.f_talker, dtype=np.int64)[order]
            kind = np.asarray(ws.f_kind, dtype=np.int64)[order]
            noisy = np.asarray(ws.f_noisy, dtype=bool)[order]
            collided = np.asarray(ws.f_collided, dtype=bool)[order]
            raws = [ws.f_raw[i] for i in order.tolist()]
            # a frame that did not go through the bit-level receiver arrived as sent, with the valid
            # CRC every simulated talker appends
            crc_good = np.ones(n, dtype=bool)
            for i in np.flatnonzero(rec.windowed).tolist():
                crc_good[i] = _crc_good(rec.received[i])
            corrupted = noisy | collided
            resp = kind == 1
            bad_on_wire = ~crc_good if sniffer_matches_bus else corrupted
            np.add.at(self._counts["crc_errors"], talker[resp & bad_on_wire], 1)
            np.add.at(self._counts["collisions"], talker[resp & collided], 1)
            np.add.at(self._counts["frames_sent"], talker[resp], 1)
            idle = rec.idle_byte if rec.idle_byte is not None else np.full(n, -1, dtype=np.int64)
            np.add.at(self._counts["idle_line_bytes"], talker[(idle >= 0) & (talker != MASTER)], 1)
            self._idle_master += int(((idle >= 0) & (talker == MASTER)).sum())
            s, e = merge_intervals(start.astype(np.float64), end.astype(np.float64))
            self._busy_ns += float((e - s).sum())
            self._n_frames += n
            self._n_bytes += sum(len(r) for r in raws)
            self._t_first = int(start[0]) if self._t_first is None else self._t_first
            self._t_last = max(int(end.max()), self._t_last or 0)
            if self.keep_tables:
                addr = np.fromiter((r[0] for r in raws), dtype=np.int64, count=n)
                self._frames.append(pd.DataFrame({
                    "t_first_bit_ns": start, "t_last_bit_ns": end,
                    "talker": pd.array(["master" if t == MASTER else int(t) for t in talker.tolist()],
                                       dtype=object),
                    "station": addr.astype(np.uint8),
                    "kind": pd.Categorical.from_codes(kind, FRAME_KINDS),
                    "transaction": np.asarray(ws.f_txn, dtype=np.int64)[order],
                    "raw": pd.array(raws, dtype=object), "received": pd.array(rec.received, dtype=object),
                    "corrupted": corrupted, "collided": collided, "noisy": noisy, "crc_ok": crc_good,
                    "line_errors": rec.line_errors,
                    "gap_after_byte": np.asarray(ws.f_gap_at, dtype=np.int64)[order],
                    "idle_byte_after": idle,
                }))
        self._stray += rec.stray_bytes
        if ws.x_id:
            st = np.asarray(ws.x_station, dtype=np.int64)
            outc = np.asarray(ws.x_outcome, dtype=np.int64)
            retry = np.asarray(ws.x_retry, dtype=bool)
            req_bad = np.asarray(ws.x_req_corrupt, dtype=bool)
            req_end = np.asarray(ws.x_req_end, dtype=np.int64)
            # a timeout has no answer in the transaction view, even where a damaged late answer
            # is on the wire (it stays in the frame table under this transaction's id)
            no_answer = outc == OUTCOMES.index("timeout")
            rsp_start = np.where(no_answer, -1, np.asarray(ws.x_resp_start, dtype=np.int64))
            rsp_end = np.where(no_answer, -1, np.asarray(ws.x_resp_end, dtype=np.int64))
            rsp_raw = [b"" if gone else r for gone, r in zip(no_answer.tolist(), ws.x_resp_raw)]
            responder = np.where(no_answer, -1, np.asarray(ws.x_responder, dtype=np.int64))
            exc = np.asarray(ws.x_exc, dtype=np.int64)
            ids = np.asarray(ws.x_id, dtype=np.int64)
            master_answer = np.asarray(ws.x_master_answer, dtype=np.int64)
            np.add.at(self._counts["master_took_earlier"], st[(master_answer >= 0) & (master_answer < ids)], 1)
            rt = np.where(rsp_start >= 0, (rsp_start - req_end) / 1e6, np.nan)
            station_tx = st != 0
            np.add.at(self._counts["requests"], st[station_tx], 1)
            np.add.at(self._counts["retries"], st[station_tx & retry], 1)
            np.add.at(self._counts["requests_corrupted"], st[station_tx & req_bad], 1)
            for code, name in enumerate(OUTCOMES):
                np.add.at(self._counts[name], st[outc == code], 1)
            is_exc = outc == OUTCOMES.index("exception")
            np.add.at(self._exc, (st[is_exc], exc[is_exc]), 1)
            timed = np.isin(outc, [0, 1, 3]) & ~req_bad
            for a in np.unique(st[timed]).tolist():
                self._rt.setdefault(a, []).append(rt[timed & (st == a)].astype(np.float64))
            if self.keep_tables:
                self._txns.append(pd.DataFrame({
                    "transaction": np.asarray(ws.x_id, dtype=np.int64),
                    "t_request_start_ns": np.asarray(ws.x_req_start, dtype=np.int64),
                    "t_request_end_ns": req_end, "t_response_start_ns": rsp_start,
                    "t_response_end_ns": rsp_end,
                    "station": st.astype(np.uint8), "function": np.asarray(ws.x_function, dtype=np.uint8),
                    "outcome": pd.Categorical.from_codes(outc, OUTCOMES),
                    "exception_code": exc.astype(np.uint8), "retry": retry,
                    "response_ms": rt, "response_ms_low": rt, "response_ms_high": rt,
                    "request_corrupted": req_bad,
                    "request_raw": pd.array(ws.x_req_raw, dtype=object),
                    "response_raw": pd.array(rsp_raw, dtype=object),
                    "responder": responder,
                    "attempt": np.asarray(ws.x_attempt, dtype=np.int64),
                    "retry_of": np.asarray(ws.x_retry_of, dtype=np.int64),
                    "master_answer": master_answer,
                }))

    def finish(self, events: pd.DataFrame, duration_s: float) -> None:
        """Compute the summaries once the last slice is in."""
        self.events = events
        self.stations = {}
        c = self._counts
        for a in sorted(self._names):
            rts = np.concatenate(self._rt.get(a, [np.zeros(0)]))
            exc = {int(code): int(self._exc[a, code]) for code in np.flatnonzero(self._exc[a])}
            self.stations[a] = {
                "name": self._names[a],
                "requests": int(c["requests"][a]),
                "requests_corrupted": int(c["requests_corrupted"][a]),
                "answered": int(c["ok"][a] + c["exception"][a]),
                "ok": int(c["ok"][a]),
                "timeouts": int(c["timeout"][a]),
                "late": int(c["late"][a]),
                "exceptions": {**exc, "total": int(sum(exc.values()))},
                "corrupt": int(c["corrupt"][a]),
                "crc_errors": int(c["crc_errors"][a]),
                "collisions": int(c["collisions"][a]),
                "retries": int(c["retries"][a]),
                "master_took_earlier": int(c["master_took_earlier"][a]),
                "idle_line_bytes": int(c["idle_line_bytes"][a]),
                "response_ms": _percentiles(rts),
            }
        busy = self._busy_ns / 1e9
        # the last transaction may run a little past the requested duration
        span = max(duration_s, ((self._t_last or 0) - int(self.meta.get("start_monotonic_ns", 0))) / 1e9)
        self.bus = {
            "duration_s": duration_s,
            "span_s": span,
            "frames": self._n_frames,
            "bytes": self._n_bytes,
            "utilisation": busy / span if span > 0 else 0.0,
            "transactions": int(sum(int(c[o].sum()) for o in OUTCOMES)),
            "broadcasts": int(c["broadcast"].sum()),
            "stray_bytes": self._stray,
            "idle_line_bytes": {"master": self._idle_master,
                                "stations": int(c["idle_line_bytes"].sum())},
        }

    # -- tables ------------------------------------------------------------------------------
    @property
    def frames(self) -> pd.DataFrame:
        if self._frames_df is None:
            self._frames_df = _concat(self._frames, FRAME_COLUMNS)
            self._frames = [self._frames_df]
        return self._frames_df

    @property
    def transactions(self) -> pd.DataFrame:
        if self._txns_df is None:
            self._txns_df = _concat(self._txns, TRANSACTION_COLUMNS)
            self._txns = [self._txns_df]
        return self._txns_df

    def to_dict(self) -> dict:
        out = {"format": TRUTH_FORMAT, "version": TRUTH_VERSION, **self.meta, "bus": self.bus,
               "stations": {str(a): v for a, v in self.stations.items()},
               "events": _columnar(self.events, EVENT_COLUMNS)}
        if self.keep_tables:
            out["frames"] = _columnar(self.frames, FRAME_COLUMNS)
            out["transactions"] = _columnar(self.transactions, _JSON_TRANSACTION_COLUMNS)
        return out

    def to_json(self, path: str | os.PathLike) -> None:
        """Write the truth as compact columnar JSON (``docs/truth-format.md``)."""
        p = Path(path)
        try:
            with open(p, "x", encoding="utf-8") as f:
                json.dump(self.to_dict(), f, separators=(",", ":"), allow_nan=False)
        except FileExistsError:
            raise OutputError(f"{p}: already exists; choose another name for the truth (nothing was overwritten)") \
                from None
        except OSError as exc:
            raise OutputError(f"{p}: cannot write the truth ({exc.strerror})") from None


def _percentiles(values: np.ndarray) -> dict:
    if len(values) == 0:
        return {"count": 0, "min": None, "p50": None, "p95": None, "p99": None, "max": None}
    q = np.percentile(values, [50, 95, 99])
    return {"count": len(values), "min": round(float(values.min()), 4), "p50": round(float(q[0]), 4),
            "p95": round(float(q[1]), 4), "p99": round(float(q[2]), 4), "max": round(float(values.max()), 4)}


def _concat(parts: list[pd.DataFrame], columns: list[str]) -> pd.DataFrame:
    if not parts:
        return pd.DataFrame({c: [] for c in columns})
    df = pd.concat(parts, ignore_index=True) if len(parts) > 1 else parts[0]
    return df[columns]


def _columnar(df: pd.DataFrame, columns: list[str]) -> dict:
    out: dict = {"columns": columns}
    for col in columns:
        series = df[col] if col in df else pd.Series([], dtype=object)
        if col == "received":
            # null where the sniffer received exactly what was sent (most frames): keeps the file small
            out[col] = [None if v == r else bytes(v).hex() for v, r in zip(series.tolist(), df["raw"].tolist())]
        elif col in _BYTES_COLUMNS:
            out[col] = [bytes(v).hex() for v in series.tolist()]
        elif series.dtype.kind == "f":
            out[col] = [None if math.isnan(v) else round(v, 6) for v in series.tolist()]
        else:
            out[col] = [v if not isinstance(v, (np.integer, np.bool_)) else v.item() for v in series.tolist()]
    return out


def read_truth(path: str | os.PathLike) -> dict:
    """Load a truth JSON file back into tables: ``{"frames": DataFrame, ...}`` plus the other keys."""
    with open(path, encoding="utf-8") as f:
        data = json.load(f)
    for key in ("frames", "transactions", "events"):
        if key in data:
            cols = data[key]["columns"]
            df = pd.DataFrame({c: data[key][c] for c in cols})
            for c in cols:
                if c in _BYTES_COLUMNS and c != "received":
                    df[c] = [bytes.fromhex(h) for h in df[c]]
            if "response_ms" in df:
                df["response_ms"] = df["response_ms"].astype(float)
                df["response_ms_low"] = df["response_ms"]
                df["response_ms_high"] = df["response_ms"]
            if "received" in df:
                df["received"] = [bytes.fromhex(h) if isinstance(h, str) else r for h, r in zip(df["received"], df["raw"])]
            data[key] = df
    return data
