"""The decoder's output tables (docs/tables.md), built from objects and from bulk columns alike.

The bulk path hands over numpy columns, the sequential path hands over objects; a
:class:`Collector` keeps both in stream order and builds each table once per call, so a
batch costs a handful of array concatenations, not one DataFrame row per frame.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from buswitness.decode.events import DIRECTIONS, EVENT_KINDS, OUTCOMES, Damage, Frame, Transaction
from buswitness.decode.rawbytes import PickedRaws, RawColumn

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
EVENT_CODE = {k: i for i, k in enumerate(EVENT_KINDS)}
# Built once: pandas checks a category list each time a dtype is made from one.
_DIRECTION_DTYPE = pd.CategoricalDtype(list(DIRECTIONS))
_OUTCOME_DTYPE = pd.CategoricalDtype(list(OUTCOMES))
_EVENT_DTYPE = pd.CategoricalDtype(list(EVENT_KINDS))
_PROTOCOL_DTYPES: dict[str, pd.CategoricalDtype] = {}


def _protocol_dtype(name: str) -> pd.CategoricalDtype:
    dtype = _PROTOCOL_DTYPES.get(name)
    if dtype is None:
        dtype = _PROTOCOL_DTYPES[name] = pd.CategoricalDtype([name])
    return dtype
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
    data["protocol"] = pd.Categorical.from_codes(np.zeros(n, np.int8), dtype=_protocol_dtype(proto.name),
                                                 validate=False)
    hook = getattr(proto, hook_name, None) if hook_name else None
    if hook is not None:
        data.update(hook(data))
    return [c for c in data if c not in _V1_COLUMNS]


def frames_frame(chunks: list[dict], proto=None) -> pd.DataFrame:
    data = {name: _concat(chunks, name, _FRAME_TYPES[name]) for name in FRAME_COLUMNS if name != "raw"}
    data["direction"] = pd.Categorical.from_codes(data["direction"], dtype=_DIRECTION_DTYPE)
    data["raw"] = _objects(chunks, "raw")
    extra = [] if proto is None else _neutral(data, len(data["raw"]), proto, "frame_fields_columns")
    return pd.DataFrame(data, columns=list(FRAME_COLUMNS) + extra)


def transactions_frame(chunks: list[dict], proto=None) -> pd.DataFrame:
    data = {name: _concat(chunks, name, _TXN_TYPES[name]) for name in TRANSACTION_COLUMNS
            if name not in ("request_raw", "response_raw")}
    data["outcome"] = pd.Categorical.from_codes(data["outcome"], dtype=_OUTCOME_DTYPE)
    data["request_raw"] = _objects(chunks, "request_raw")
    data["response_raw"] = _objects(chunks, "response_raw")
    extra = [] if proto is None else _neutral(data, len(data["request_raw"]), proto, "transaction_fields_columns")
    return pd.DataFrame(data, columns=list(TRANSACTION_COLUMNS) + extra)


def event_columns(events: list[Damage]) -> dict:
    """Columns of the events table for event objects (kinds as codes, -1 for one this build does not know)."""
    return {
        "t_ns": np.array([e.t_ns for e in events], dtype=np.int64),
        "kind": np.array([EVENT_CODE.get(e.kind, -1) for e in events], dtype=np.int8),
        "station": np.array([e.station for e in events], dtype=np.int16),
        "port": np.array([e.port for e in events], dtype=np.uint8),
        "raw": [e.raw for e in events], "detail": [e.detail for e in events],
    }


def events_frame(events: list[Damage], proto=None) -> pd.DataFrame:
    data = event_columns(events)
    data["kind"] = pd.Categorical.from_codes(data["kind"], dtype=_EVENT_DTYPE)
    data["raw"] = pd.Series(data["raw"], dtype=object)
    data["detail"] = pd.Series(data["detail"], dtype=object)
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


class DecodeOutput:
    """The three tables one call produced (any may be empty).

    The decoder hands over columns; each table is built the first time it is read, so a
    reader batch costs no DataFrame until someone looks, and :meth:`concat` joins many
    outputs' columns into one table each (one DataFrame per analysis block, not three per
    batch). ``DecodeOutput(frames, transactions, events)`` still wraps ready DataFrames.
    """

    __slots__ = ("_tables", "_parts")

    def __init__(self, frames: pd.DataFrame | None = None, transactions: pd.DataFrame | None = None,
                 events: pd.DataFrame | None = None) -> None:
        self._tables = [frames, transactions, events]
        self._parts: tuple | None = None

    @classmethod
    def from_columns(cls, frame_chunks: list[dict], txn_chunks: list[dict], events: list[Damage],
                     proto=None) -> DecodeOutput:
        """An output over column chunks and event objects; its tables are built when first read."""
        out = cls()
        out._parts = (frame_chunks, txn_chunks, events, proto)
        return out

    @classmethod
    def from_objects(cls, items: list, proto=None) -> DecodeOutput:
        """Tables of objects; with ``proto``, the protocol-neutral columns too (schema version 2)."""
        col = Collector()
        col.add_objects(items)
        return col.output(proto)

    @classmethod
    def from_frames(cls, frames: pd.DataFrame, transactions: pd.DataFrame, events: pd.DataFrame) -> DecodeOutput:
        """An output of ready tables (the inverse of :meth:`to_frames`)."""
        return cls(frames, transactions, events)

    def to_frames(self) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
        """The three tables as DataFrames: frames, transactions, events."""
        return self.frames, self.transactions, self.events

    def columns(self) -> tuple[Columns, Columns, Columns]:
        """The three tables' version-1 columns as numpy arrays (:class:`Columns`), no DataFrame built.

        For a reader that needs no table (the figures): the frames' bytes stay where the decoder
        found them until a row is read.
        """
        if self._parts is None:
            return tuple(Columns.of_frame(t) for t in self.to_frames())  # type: ignore[return-value]
        frame_chunks, txn_chunks, events, _proto = self._parts
        frames = {name: _concat(frame_chunks, name, _FRAME_TYPES[name]) for name in FRAME_COLUMNS if name != "raw"}
        frames["raw"] = RawColumn([c["raw"] for c in frame_chunks])
        txns = {name: _concat(txn_chunks, name, _TXN_TYPES[name]) for name in TRANSACTION_COLUMNS
                if name not in ("request_raw", "response_raw")}
        txns["request_raw"] = RawColumn([c["request_raw"] for c in txn_chunks])
        txns["response_raw"] = RawColumn([c["response_raw"] for c in txn_chunks])
        return Columns(frames), Columns(txns), Columns(event_columns(events))

    def _table(self, k: int) -> pd.DataFrame:
        table = self._tables[k]
        if table is None:
            if self._parts is None:
                raise ValueError("a DecodeOutput needs its three tables or its columns")
            frame_chunks, txn_chunks, events, proto = self._parts
            table = (frames_frame(frame_chunks, proto) if k == 0 else transactions_frame(txn_chunks, proto) if k == 1
                     else events_frame(events, proto))
            self._tables[k] = table
            if all(t is not None for t in self._tables):
                self._parts = None
        return table

    @property
    def frames(self) -> pd.DataFrame:
        return self._table(0)

    @frames.setter
    def frames(self, value: pd.DataFrame) -> None:
        self._tables[0] = value

    @property
    def transactions(self) -> pd.DataFrame:
        return self._table(1)

    @transactions.setter
    def transactions(self, value: pd.DataFrame) -> None:
        self._tables[1] = value

    @property
    def events(self) -> pd.DataFrame:
        return self._table(2)

    @events.setter
    def events(self, value: pd.DataFrame) -> None:
        self._tables[2] = value

    def counts(self) -> tuple[int, int, int]:
        """Rows of the frames, transactions and events tables, without building them."""
        parts = self._parts
        got = []
        for k in range(3):
            table = self._tables[k]
            if table is not None:
                got.append(len(table))
            elif k == 2:
                got.append(len(parts[2]))
            else:
                got.append(sum(_rows(c) for c in parts[k]))
        return got[0], got[1], got[2]

    @property
    def rows(self) -> int:
        """Rows of all three tables together."""
        return sum(self.counts())

    @classmethod
    def concat(cls, outputs: list[DecodeOutput], proto=None) -> DecodeOutput:
        """Many outputs as one, in order: their columns joined, each table built once.

        The tables equal ``pd.concat`` of the outputs' own tables (``ignore_index``).
        """
        if outputs and all(o._parts is not None and not any(t is not None for t in o._tables) for o in outputs):
            protos = {id(o._parts[3]) for o in outputs}
            if len(protos) == 1:
                frames: list = []
                txns: list = []
                events: list = []
                for o in outputs:
                    frames += o._parts[0]
                    txns += o._parts[1]
                    events += o._parts[2]
                return cls.from_columns(frames, txns, events, outputs[0]._parts[3])
        if not outputs:
            return cls.from_columns([], [], [], proto)
        return cls(*(pd.concat([getattr(o, t) for o in outputs], ignore_index=True)
                     for t in ("frames", "transactions", "events")))

    def __repr__(self) -> str:
        f, t, e = self.counts()
        return f"DecodeOutput(frames={f} rows, transactions={t} rows, events={e} rows)"


class Columns:
    """A table as numpy columns: categories as codes in the table's vocabulary (docs/tables.md;
    -1 for a kind this build does not know), bytes columns as sequences of ``bytes``.

    What the figures read instead of a DataFrame: ``len(t)``, ``t.empty``, ``t[name]`` and
    ``name in t`` behave as on the table.
    """

    __slots__ = ("data", "rows")

    #: Columns held as category codes, and their vocabularies.
    CATEGORIES = {"direction": DIRECTIONS, "outcome": OUTCOMES, "kind": EVENT_KINDS}

    def __init__(self, data: dict) -> None:
        self.data = data
        self.rows = len(next(iter(data.values()))) if data else 0

    @classmethod
    def of_frame(cls, table: pd.DataFrame) -> Columns:
        """A DataFrame's columns (categories of the table's vocabulary as codes)."""
        data: dict = {}
        for name in table.columns:
            col = table[name]
            vocab = cls.CATEGORIES.get(name)
            if vocab is not None:
                index = {v: i for i, v in enumerate(vocab)}
                values = col.astype(object).to_numpy()
                data[name] = np.fromiter((index.get(str(v), -1) for v in values), np.int8, len(values))
            else:
                data[name] = col.to_numpy()
        return cls(data)

    def __len__(self) -> int:
        return self.rows

    @property
    def empty(self) -> bool:
        return self.rows == 0

    def __getitem__(self, name: str):
        return self.data[name]

    def __contains__(self, name: object) -> bool:
        return name in self.data

    def take(self, index: np.ndarray) -> Columns:
        """The rows at ``index``, in that order (a column that is not an array, the bytes columns,
        picked as :class:`PickedRaws`: its entries made only when read)."""
        return Columns({k: v[index] if isinstance(v, np.ndarray) else PickedRaws(v, index)
                        for k, v in self.data.items()})


def _rows(chunk: dict) -> int:
    for v in chunk.values():
        return len(v)
    return 0


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
        return DecodeOutput.from_columns(self.frame_chunks, self.txn_chunks, self.events, proto)


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
