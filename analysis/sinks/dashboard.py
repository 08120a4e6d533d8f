"""The dashboard (report.html) as a sink.

It keeps what a short capture needs to be drawn in bins under a minute (analysis/timebins.py):
the times of its transactions, frames and events, given up past half an hour.
"""

from __future__ import annotations

from pathlib import Path

import pandas as pd
from buswitness.analysis.sinks import Sink, SinkContext
from buswitness.analysis.timebins import TimeDetail


class DashboardSink(Sink):
    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self.detail: TimeDetail | None = None

    def open(self, context: SinkContext) -> None:
        self.detail = TimeDetail(context.t0_ns)

    def write(self, frames: pd.DataFrame, transactions: pd.DataFrame, events: pd.DataFrame) -> None:
        if self.detail is not None:
            self.detail.add(frames, transactions, events)

    def close(self, result) -> list[Path]:
        from buswitness.analysis.dashboard import write_dashboard
        detail, self.detail = self.detail, None
        return [write_dashboard(result, self.path, detail)]

    def abort(self) -> None:
        self.detail = None
