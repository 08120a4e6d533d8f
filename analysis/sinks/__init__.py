"""Outputs as sinks: ``analyze(source, sinks=[...])`` feeds each sink, one module per output.

A sink sees the capture's clock once (``open``), every block of decoder tables as it streams
past (``write``; the table sinks use it, the report sinks ignore it), then the finished result
(``close``: the report sinks render it; everything is put in place atomically, so a failed run
leaves earlier outputs as they were). ``abort`` drops whatever a sink had half written.

| module | sink | writes |
|---|---|---|
| ``dashboard`` | ``DashboardSink(path)`` | report.html |
| ``evidence`` | ``EvidenceSink(path, address)`` | the evidence report on one station |
| ``summary`` | ``SummarySink(path)`` | summary.json |
| ``csv`` | ``CsvSink(folder)`` | transactions.csv, frames.csv, events.csv |
| ``parquet`` | ``ParquetSink(folder)`` | the same three tables as Parquet |
| ``dataset`` | ``DatasetSink(root, site, bus)`` | the capture into a fleet dataset (docs/fleet.md) |
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING

import pandas as pd

if TYPE_CHECKING:
    from buswitness.analysis.result import AnalysisResult
    from buswitness.capture.fileformat import CaptureHeader


@dataclass(frozen=True)
class SinkContext:
    """What a sink knows before the first block: the capture's header and clock."""

    header: CaptureHeader
    t0_ns: int              #: the capture start on the record clock; every reported time counts from it
    utc0_ns: int | None     #: UTC (ns since 1970) at t0_ns, when the capture states its wall clock
    paths: tuple = ()


class Sink:
    """One output of ``analyze``. Subclasses override what they need."""

    def open(self, context: SinkContext) -> None:
        """The capture's clock is known; the first block follows."""

    def write(self, frames: pd.DataFrame, transactions: pd.DataFrame, events: pd.DataFrame) -> None:
        """One block of decoder tables (docs/tables.md)."""

    def close(self, result: AnalysisResult) -> list[Path]:
        """The result is complete (findings included): finish and return the files written."""
        return []

    def abort(self) -> None:
        """The analysis failed: drop anything half written."""


__all__ = ["Sink", "SinkContext"]
