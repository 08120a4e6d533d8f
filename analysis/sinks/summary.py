"""summary.json (docs/summary-schema.md) as a sink."""

from __future__ import annotations

from pathlib import Path

from buswitness.analysis.sinks import Sink


class SummarySink(Sink):
    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)

    def close(self, result) -> list[Path]:
        from buswitness.analysis.summary import write_summary
        return [write_summary(result, self.path)]
