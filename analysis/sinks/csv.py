"""transactions.csv, frames.csv and events.csv (docs/tables.md) as a sink."""

from __future__ import annotations

from buswitness.analysis.sinks.tables import TableSink


class CsvSink(TableSink):
    csv = True
