"""The streamed table exports (analysis/exports.py) behind the sink interface; csv.py and parquet.py pick a format."""

from __future__ import annotations

from pathlib import Path

import pandas as pd
from buswitness.analysis.sinks import Sink, SinkContext


class TableSink(Sink):
    """Transactions, frames and events, written block by block and renamed into place at the end."""

    csv = False

    def __init__(self, folder: str | Path) -> None:
        self.folder = Path(folder)
        self._exporter = None

    def open(self, context: SinkContext) -> None:
        from buswitness.analysis.exports import TableExporter, utc_anchor_of
        where = str(self.folder)
        self._exporter = TableExporter(context.t0_ns, utc_anchor_of(context.header.start_utc),
                                       where if self.csv else None, None if self.csv else where)

    def write(self, frames: pd.DataFrame, transactions: pd.DataFrame, events: pd.DataFrame) -> None:
        self._exporter.write(frames, transactions, events)

    def close(self, result) -> list[Path]:
        from buswitness.analysis.pipeline import _empty_tables
        self._exporter.close(*_empty_tables())
        return list(self._exporter.paths)

    def abort(self) -> None:
        if self._exporter is not None:
            self._exporter.abort()
