"""The evidence report on one station as a sink."""

from __future__ import annotations

from pathlib import Path

from buswitness.analysis.sinks import Sink


class EvidenceSink(Sink):
    def __init__(self, path: str | Path, address: int) -> None:
        self.path, self.address = Path(path), int(address)

    def close(self, result) -> list[Path]:
        from buswitness.analysis.evidence import write_evidence
        return [write_evidence(result, self.address, self.path)]
