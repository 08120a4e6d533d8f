"""Small rolling per-station counters for the live views (``watch``, the ``record`` status line).

Fed with the decoder's output tables (``docs/tables.md``: frames, transactions, events), one
batch at a time; it keeps running totals per station and the last ``window`` response times
for a rolling p95. Pure: no clock, no I/O, so it is tested with hand-built tables.
"""

from __future__ import annotations

import math
import threading
from collections import deque
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

#: Outcomes where the station gave a usable answer (docs/tables.md vocabulary).
ANSWERED = frozenset({"ok", "exception", "late"})


@dataclass
class StationFigures:
    """Running figures of one station."""

    station: int
    requests: int = 0
    answered: int = 0
    timeouts: int = 0
    exceptions: int = 0
    late: int = 0
    corrupt: int = 0
    frames: int = 0
    crc_errors: int = 0
    last_response_ms: float | None = None
    recent_ms: deque = field(default_factory=lambda: deque(maxlen=1000))

    @property
    def p95_ms(self) -> float | None:
        """95th percentile of the recent response times (nearest rank), None before the first answer."""
        if not self.recent_ms:
            return None
        ordered = sorted(self.recent_ms)
        rank = max(1, math.ceil(0.95 * len(ordered)))
        return float(ordered[rank - 1])


def _rows(table: Any) -> Iterable[Mapping[str, Any]]:
    if table is None:
        return ()
    to_dict = getattr(table, "to_dict", None)
    if callable(to_dict):
        return to_dict("records")
    return table


class RollingStations:
    """Per-station counters updated from decoder output, for a live table."""

    def __init__(self, window: int = 1000) -> None:
        self.window = window
        self.stations: dict[int, StationFigures] = {}
        self.line_errors = 0
        self.port_gaps = 0

    def _station(self, address: int) -> StationFigures:
        fig = self.stations.get(address)
        if fig is None:
            fig = StationFigures(address, recent_ms=deque(maxlen=self.window))
            self.stations[address] = fig
        return fig

    def add_transactions(self, table: Any) -> None:
        """Count requests, answers and timeouts; remember response times (broadcasts are not counted)."""
        for row in _rows(table):
            outcome = str(row.get("outcome", ""))
            if outcome == "broadcast":
                continue
            fig = self._station(int(row["station"]))
            fig.requests += 1
            if outcome in ANSWERED:
                fig.answered += 1
            if outcome == "timeout":
                fig.timeouts += 1
            elif outcome == "exception":
                fig.exceptions += 1
            elif outcome == "late":
                fig.late += 1
            elif outcome == "corrupt":
                fig.corrupt += 1
            ms = row.get("response_ms")
            if ms is not None and not (isinstance(ms, float) and math.isnan(ms)):
                fig.last_response_ms = float(ms)
                fig.recent_ms.append(float(ms))

    def add_frames(self, table: Any) -> None:
        """Count valid frames per address."""
        for row in _rows(table):
            self._station(int(row["address"])).frames += 1

    def add_events(self, table: Any) -> None:
        """Count CRC failures per station (unknown station: not attributed) and line events."""
        for row in _rows(table):
            kind = str(row.get("kind", ""))
            if kind == "crc_error":
                station = int(row.get("station", -1))
                if station >= 0:
                    self._station(station).crc_errors += 1
            elif kind in ("line_error", "break"):
                self.line_errors += 1
            elif kind == "port_gap":
                self.port_gaps += 1

    def add_output(self, output: Any) -> None:
        """Take one decoder output (anything with ``frames``, ``transactions`` and ``events``)."""
        self.add_frames(getattr(output, "frames", None))
        self.add_transactions(getattr(output, "transactions", None))
        self.add_events(getattr(output, "events", None))

    def rows(self) -> list[StationFigures]:
        """Stations in address order."""
        return [self.stations[k] for k in sorted(self.stations)]


#: Records waiting for the live decoder beyond which it is switched off (it cannot keep up).
MAX_PENDING_RECORDS = 200_000


class LiveDecoder:
    """Feed recorded records to the project's decoder, if this build has one, and keep rolling counts.

    ``LiveDecoder.create(header)`` returns None when the decoder is not available; any error
    from it later switches the live figures off (``disabled_reason``) without touching the
    recording.
    """

    def __init__(self, decoder: Any, batch_cls: Any, record_cls: Any) -> None:
        self._decoder = decoder
        self._batch_cls = batch_cls
        self._record_cls = record_cls
        self._pending: list[Any] = []
        self._lock = threading.Lock()
        self.figures = RollingStations()
        self.disabled_reason: str | None = None

    @classmethod
    def create(cls, header: Any) -> LiveDecoder | None:
        try:
            from buswitness.capture.fileformat import Record, RecordBatch
            from buswitness.decode import Decoder, DecoderConfig  # type: ignore[attr-defined]
            decoder = Decoder(DecoderConfig.from_header(header))
        except Exception:  # noqa: BLE001 -- the decoder is optional for live views: any failure means "not available"
            return None
        return cls(decoder, RecordBatch, Record)

    def add(self, port: int, t_ns: int, data: bytes, flags: int) -> None:
        """Queue one record (cheap; called for every record written)."""
        if self.disabled_reason is None:
            with self._lock:
                self._pending.append(self._record_cls(port, t_ns, data, flags))
                if len(self._pending) > MAX_PENDING_RECORDS:
                    self._pending = []
                    self.disabled_reason = ("live station figures stopped: the decoder could not keep up with "
                                            "the traffic (the recording is not affected)")

    def update(self) -> None:
        """Decode what was queued since the last call and add it to the figures."""
        if self.disabled_reason is not None:
            return
        with self._lock:
            pending, self._pending = self._pending, []
        if not pending:
            return
        try:
            out = self._decoder.feed_batch(self._batch_cls.from_records(pending))
            self.figures.add_output(out)
        except Exception as exc:  # noqa: BLE001 -- a decoder fault must never stop a recording
            self.disabled_reason = f"live station figures stopped ({type(exc).__name__}: {exc})"

    def finish(self) -> None:
        """End of input: decode what is left and close the last transactions."""
        self.update()
        if self.disabled_reason is not None:
            return
        try:
            self.figures.add_output(self._decoder.flush())
        except Exception as exc:  # noqa: BLE001 -- as in update: the live figures are a convenience
            self.disabled_reason = f"live station figures stopped ({type(exc).__name__}: {exc})"
