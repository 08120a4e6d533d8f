"""The three tables as Parquet files (needs pyarrow: ``pip install 'buswitness[parquet]'``) as a sink."""

from __future__ import annotations

from buswitness.analysis.sinks.tables import TableSink


class ParquetSink(TableSink):
    csv = False
