"""The decoder's output tables (docs/tables.md), built from objects and from bulk columns alike.

The bulk path hands over numpy columns, the sequential path hands over objects; a
:class:`Collector` keeps both in stream order and builds each table once per call, so a
batch costs a handful of array concatenations, not one DataFrame row per frame.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd
from buswitness.decode.events import DIRECTIONS, EVENT_KINDS, OUTCOMES, Damage, Frame, Transaction

#: Version of the table layout (docs/tables.md). 2: protocol-neutral columns added (protocol, source,
#: destination, service, result_code); every column of version 1 is unchanged.
SCHEMA_VERSION = 2

#: Protocol-neutral columns each table gains after its version-1 columns (docs/tables.md).
NEUTRAL_FRAME_COLUMNS = ("protocol", "source", "destination", "service")
NEUTRAL_TRANSACTION_COLUMNS = ("protocol", "source", "destination", "service", "result_code")
NEUTRAL_EVENT_COLUMNS = ("protocol",)

FRAME_COLUMNS = ("t_start_ns", "t_end_ns", "t_end_lo_ns", "t_end_hi_ns", "port", "address", "function", "length",
                 "direction", "raw")
TRANSACTION_COLUMNS = ("t_request_end_ns", "t_response_start_ns", "station", "function", "outcome",
                       "exception_code", "retry", "response_ms", "response_ms_low", "response_ms_high",
                       "request_raw", "response_raw")
EVENT_COLUMNS = ("t_ns", "kind", "station", "port", "raw", "detail")
_V1_COLUMNS = frozenset(FRAME_COLUMNS) | frozenset(TRANSACTION_COLUMNS) | frozenset(EVENT_COLUMNS)

_FRAME_TYPES = {"t_start_ns": np.int64, "t_end_ns": np.int64, "t_end_lo_ns": np.int64, "t_end_hi_ns": np.int64,
                "port": np.uint8, "address": np.uint8, "function": np.uint8, "length": np.int32, "direction": np.int8}
_TXN_TYPES = {"t_request_end_ns": np.int64, "t_response_start_ns": np.int64, "station": np.uint8,
              "function": np.uint8, "outcome": np.int8, "exception_code": np.uint8, "retry": bool,
              "response_ms": np.float64, "response_ms_low": np.float64, "response_ms_high": np.float64}
DIRECTION_CODE = {d: i for i, d in enumerate(DIRECTIONS)}
OUTCOME_CODE = {o: i for i, o in enumerate(OUTCOMES)}


def frame_columns(frames: list[Frame]) -> dict:
    """Columns of the frames table for frame objects (categories as codes)."""
    return {
        "t_start_ns": [f.t_start_ns for f in frames], "t_end_ns": [f.t_end_ns for f in frames],
        "t_end_lo_ns": [f.t_end_lo_ns for f in frames], "t_end_hi_ns": [f.t_end_hi_ns for f in frames],
        "port": [f.port for f in frames], "address": [f.address for f in frames],
        "function": [f.function for f in frames], "length": [f.length for f in frames],
        "direction": [DIRECTION_CODE[f.direction] for f in frames], "raw": [f.raw for f in frames],
    }


def transaction_columns(txns: list[Transaction]) -> dict:
    """Columns of the transactions table for transaction objects (categories as codes)."""
    cols: dict = {name: [getattr(t, name) for t in txns] for name in TRANSACTION_COLUMNS if name != "outcome"}
    cols["outcome"] = [OUTCOME_CODE[t.outcome] for t in txns]
    return cols


def _concat(chunks: list[dict], name: str, dtype) -> np.ndarray:
    parts = [np.asarray(c[name], dtype=dtype) for c in chunks]
    return np.concatenate(parts) if parts else np.zeros(0, dtype=dtype)


def _objects(chunks: list[dict], name: str) -> pd.Series:
    values: list = []
    for c in chunks:
        values.extend(c[name])
    return pd.Series(values, dtype=object)


def _neutral(data: dict, n: int, proto, hook_name: str) -> list[str]:
    """Add the protocol-neutral columns to ``data`` (built in one DataFrame with the rest); their names."""
    data["protocol"] = pd.Categorical.from_codes(np.zeros(n, np.int8), dtype=pd.CategoricalDtype([proto.name]),
                                                 validate=False)
    hook = getattr(proto, hook_name, None) if hook_name else None
    if hook is not None:
        data.update(hook(data))
    return [c for c in data if c not in _V1_COLUMNS]


def frames_frame(chunks: list[dict], proto=None) -> pd.DataFrame:
    data = {name: _concat(chunks, name, _FRAME_TYPES[name]) for name in FRAME_COLUMNS if name != "raw"}
    data["direction"] = pd.Categorical.from_codes(data["direction"], categories=list(DIRECTIONS))
    data["raw"] = _objects(chunks, "raw")
    extra = [] if proto is None else _neutral(data, len(data["raw"]), proto, "frame_fields_columns")
    return pd.DataFrame(data, columns=list(FRAME_COLUMNS) + extra)


def transactions_frame(chunks: list[dict], proto=None) -> pd.DataFrame:
    data = {name: _concat(chunks, name, _TXN_TYPES[name]) for name in TRANSACTION_COLUMNS
            if name not in ("request_raw", "response_raw")}
    data["outcome"] = pd.Categorical.from_codes(data["outcome"], categories=list(OUTCOMES))
    data["request_raw"] = _objects(chunks, "request_raw")
    data["response_raw"] = _objects(chunks, "response_raw")
    extra = [] if proto is None else _neutral(data, len(data["request_raw"]), proto, "transaction_fields_columns")
    return pd.DataFrame(data, columns=list(TRANSACTION_COLUMNS) + extra)


def events_frame(events: list[Damage], proto=None) -> pd.DataFrame:
    data = {
        "t_ns": np.array([e.t_ns for e in events], dtype=np.int64),
        "kind": pd.Categorical([e.kind for e in events], categories=list(EVENT_KINDS)),
        "station": np.array([e.station for e in events], dtype=np.int16),
        "port": np.array([e.port for e in events], dtype=np.uint8),
        "raw": pd.Series([e.raw for e in events], dtype=object),
        "detail": pd.Series([e.detail for e in events], dtype=object),
    }
    extra = [] if proto is None else _neutral(data, len(events), proto, "")
    return pd.DataFrame(data, columns=list(EVENT_COLUMNS) + extra)


def frames_table(frames: list[Frame]) -> pd.DataFrame:
    """Frames as the ``frames`` table of docs/tables.md."""
    return frames_frame([frame_columns(frames)])


def transactions_table(txns: list[Transaction]) -> pd.DataFrame:
    """Transactions as the ``transactions`` table of docs/tables.md."""
    return transactions_frame([transaction_columns(txns)])


def events_table(events: list[Damage]) -> pd.DataFrame:
    """Damage and notable-traffic events as the ``events`` table of docs/tables.md."""
    return events_frame(events)


@dataclass
class DecodeOutput:
    """The three tables one call produced (any may be empty)."""

    frames: pd.DataFrame
    transactions: pd.DataFrame
    events: pd.DataFrame

    @classmethod
    def from_objects(cls, items: list, proto=None) -> DecodeOutput:
        """Tables of objects; with ``proto``, the protocol-neutral columns too (schema version 2)."""
        col = Collector()
        col.add_objects(items)
        return col.output(proto)


class Collector:
    """Objects and column chunks in stream order, turned into tables once."""

    def __init__(self) -> None:
        self.frame_chunks: list[dict] = []
        self.txn_chunks: list[dict] = []
        self.events: list[Damage] = []
        self._frames: list[Frame] = []
        self._txns: list[Transaction] = []

    def add_objects(self, items: list) -> None:
        for x in items:
            if isinstance(x, Frame):
                self._frames.append(x)
            elif isinstance(x, Transaction):
                self._txns.append(x)
            else:
                self.events.append(x)

    def add_frame_columns(self, cols: dict) -> None:
        self._close_frames()
        self.frame_chunks.append(cols)

    def add_transaction_columns(self, cols: dict) -> None:
        self._close_txns()
        self.txn_chunks.append(cols)

    def _close_frames(self) -> None:
        if self._frames:
            self.frame_chunks.append(frame_columns(self._frames))
            self._frames = []

    def _close_txns(self) -> None:
        if self._txns:
            self.txn_chunks.append(transaction_columns(self._txns))
            self._txns = []

    def output(self, proto=None) -> DecodeOutput:
        """The tables; with ``proto`` (decode/protocols/), the protocol-neutral columns too (schema version 2)."""
        self._close_frames()
        self._close_txns()
        return DecodeOutput(frames_frame(self.frame_chunks, proto), transactions_frame(self.txn_chunks, proto),
                            events_frame(self.events, proto))


def add_neutral_columns(out: DecodeOutput, proto) -> DecodeOutput:
    """``out`` (version-1 tables) with the protocol-neutral columns of ``proto`` appended (schema version 2)."""
    tables = []
    for table, hook in ((out.frames, "frame_fields_columns"), (out.transactions, "transaction_fields_columns"),
                        (out.events, None)):
        data = {c: table[c] for c in table.columns}
        if hook is None:
            data["protocol"] = pd.Categorical.from_codes(np.zeros(len(table), np.int8),
                                                         dtype=pd.CategoricalDtype([proto.name]))
            extra = ["protocol"]
        else:
            extra = _neutral(data, len(table), proto, hook)
        tables.append(pd.DataFrame(data, columns=list(table.columns) + extra, index=table.index))
    return DecodeOutput(*tables)
