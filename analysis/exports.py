"""Tables out: transactions.csv, frames.csv, events.csv and, on request, the same as Parquet.

Written block by block while the capture streams, each to a temporary name renamed into
place at the end (``atomic_write``), so a failed run leaves earlier exports untouched.
"""

from __future__ import annotations

import contextlib
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import pandas as pd
from buswitness.fsutil import atomic_write

TRANSACTION_COLUMNS = ("t_request_end_s", "utc", "station", "function", "outcome", "exception_code", "retry",
                       "response_ms", "response_ms_low", "response_ms_high", "request_hex", "response_hex")
FRAME_COLUMNS = ("t_start_s", "t_end_s", "t_end_low_s", "t_end_high_s", "utc", "port", "address", "function",
                 "length", "direction", "hex")
EVENT_COLUMNS = ("t_s", "utc", "kind", "station", "port", "hex", "detail")


#: The ``utc`` columns: timestamps with their zone, in Parquet as ``timestamp[ns, tz=UTC]``.
UTC_DTYPE = pd.DatetimeTZDtype("ns", "UTC")


def _csv_form(table: pd.DataFrame) -> pd.DataFrame:
    """``table`` with ``utc`` written as ISO 8601 with its offset (``2026-03-04T21:00:01.000000+00:00``), empty if unknown."""
    if "utc" not in table:
        return table
    out = table.copy()
    out["utc"] = table["utc"].dt.strftime("%Y-%m-%dT%H:%M:%S.%f+00:00").fillna("")
    return out


def _hex(values: pd.Series) -> pd.Series:
    return values.map(lambda b: bytes(b).hex(" "))


class TableExporter:
    """Open sinks for the three tables; ``write`` appends one block; ``close`` puts the files in place."""

    def __init__(self, t0_ns: int, utc_anchor: datetime | None, csv_dir: str | None = None,
                 parquet_dir: str | None = None) -> None:
        self.t0_ns = t0_ns
        self.utc_anchor = utc_anchor
        self._stack = contextlib.ExitStack()
        self._csv: dict[str, Any] = {}
        self._parquet: dict[str, Any] = {}
        self._parquet_files: dict[str, Any] = {}
        self._header_written: set[str] = set()
        self.paths: list[Path] = []
        for name in ("transactions", "frames", "events"):
            if csv_dir is not None:
                path = Path(csv_dir) / f"{name}.csv"
                self._csv[name] = self._stack.enter_context(atomic_write(path, "w"))
                self.paths.append(path)
            if parquet_dir is not None:
                path = Path(parquet_dir) / f"{name}.parquet"
                self._parquet_files[name] = self._stack.enter_context(atomic_write(path, "wb", encoding=None))
                self.paths.append(path)

    def _utc(self, t_ns: pd.Series) -> pd.Series:
        """Wall-clock times as real UTC timestamps (``datetime64[ns, UTC]``); NaT where the file has no clock."""
        if self.utc_anchor is None:
            return pd.Series(pd.NaT, index=t_ns.index, dtype=UTC_DTYPE)
        offset = pd.to_timedelta(t_ns.astype("int64") - self.t0_ns, unit="ns")
        return (pd.Timestamp(self.utc_anchor, tz="UTC") + offset).astype(UTC_DTYPE)

    def _secs(self, t_ns: pd.Series) -> pd.Series:
        return (t_ns.astype("int64") - self.t0_ns) / 1e9

    def shape(self, frames: pd.DataFrame, tx: pd.DataFrame, events: pd.DataFrame) -> dict[str, pd.DataFrame]:
        """The three tables in export form (seconds since capture start, UTC, hex)."""
        out = {}
        out["transactions"] = pd.DataFrame({
            "t_request_end_s": self._secs(tx["t_request_end_ns"]), "utc": self._utc(tx["t_request_end_ns"]),
            "station": tx["station"].astype(int), "function": tx["function"].astype(int),
            "outcome": tx["outcome"].astype(str), "exception_code": tx["exception_code"].astype(int),
            "retry": tx["retry"].astype(bool), "response_ms": tx["response_ms"],
            "response_ms_low": tx["response_ms_low"], "response_ms_high": tx["response_ms_high"],
            "request_hex": _hex(tx["request_raw"]), "response_hex": _hex(tx["response_raw"])},
            columns=list(TRANSACTION_COLUMNS))
        out["frames"] = pd.DataFrame({
            "t_start_s": self._secs(frames["t_start_ns"]), "t_end_s": self._secs(frames["t_end_ns"]),
            "t_end_low_s": self._secs(frames["t_end_lo_ns"]), "t_end_high_s": self._secs(frames["t_end_hi_ns"]),
            "utc": self._utc(frames["t_start_ns"]), "port": frames["port"].astype(int),
            "address": frames["address"].astype(int), "function": frames["function"].astype(int),
            "length": frames["length"].astype(int), "direction": frames["direction"].astype(str),
            "hex": _hex(frames["raw"])}, columns=list(FRAME_COLUMNS))
        out["events"] = pd.DataFrame({
            "t_s": self._secs(events["t_ns"]), "utc": self._utc(events["t_ns"]), "kind": events["kind"].astype(str),
            "station": events["station"].astype(int), "port": events["port"].astype(int),
            "hex": _hex(events["raw"]), "detail": events["detail"].astype(str)}, columns=list(EVENT_COLUMNS))
        return out

    def write(self, frames: pd.DataFrame, tx: pd.DataFrame, events: pd.DataFrame) -> None:
        if not self._csv and not self._parquet_files:
            return
        for name, table in self.shape(frames, tx, events).items():
            if name in self._csv:
                _csv_form(table).to_csv(self._csv[name], index=False, header=name not in self._header_written,
                             float_format="%.6f")
                self._header_written.add(name)
            if name in self._parquet_files:
                self._write_parquet(name, table)

    def _write_parquet(self, name: str, table: pd.DataFrame) -> None:
        import pyarrow as pa
        import pyarrow.parquet as pq
        arrow = pa.Table.from_pandas(table, preserve_index=False)
        writer = self._parquet.get(name)
        if writer is None:
            writer = pq.ParquetWriter(self._parquet_files[name], arrow.schema)
            self._parquet[name] = writer
        writer.write_table(arrow.cast(writer.schema))

    def close(self, frames_empty: pd.DataFrame, tx_empty: pd.DataFrame, events_empty: pd.DataFrame) -> None:
        """Finish every file (an empty table still gets its header row) and rename them into place."""
        for name in ("transactions", "frames", "events"):
            if (name in self._csv and name not in self._header_written) or (
                    name in self._parquet_files and name not in self._parquet):
                table = self.shape(frames_empty, tx_empty, events_empty)[name]
                if name in self._csv and name not in self._header_written:
                    _csv_form(table).to_csv(self._csv[name], index=False)
                    self._header_written.add(name)
                if name in self._parquet_files and name not in self._parquet:
                    self._write_parquet(name, table)
        for writer in self._parquet.values():
            writer.close()
        self._stack.close()

    def abort(self) -> None:
        """Drop every half-written file; earlier exports stay as they were."""
        with contextlib.suppress(Exception):
            self._stack.__exit__(RuntimeError, RuntimeError("aborted"), None)


def utc_anchor_of(start_utc: str) -> datetime | None:
    try:
        dt = datetime.fromisoformat(start_utc)
    except (TypeError, ValueError):
        return None
    if dt.tzinfo is None:
        dt = dt.replace(tzinfo=timezone.utc)
    return dt.astimezone(timezone.utc).replace(tzinfo=None)
