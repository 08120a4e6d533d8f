"""The dashboard (report.html) as a sink."""

from __future__ import annotations

from pathlib import Path

from buswitness.analysis.sinks import Sink


class DashboardSink(Sink):
    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)

    def close(self, result) -> list[Path]:
        from buswitness.analysis.dashboard import write_dashboard
        return [write_dashboard(result, self.path)]
