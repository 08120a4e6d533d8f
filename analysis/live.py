"""The analysis of ``analyze``, kept up to date while records arrive (``watch``).

The same decoder configuration, accumulator and judging as ``analysis/pipeline.py``, fed a
batch at a time, so the live figures are the figures ``analyze`` gives on the same bytes:

* Until the delivery sample is complete (the first ``DELIVERY_SAMPLE_RECORDS`` records with
  bytes, as ``analyze`` reads ahead to estimate adapter latency and character pitch), the
  records are kept and decoded with the header's own settings for the live view; when the
  sample is complete it is assessed as ``analyze`` assesses it, and everything kept is
  decoded again with the result. :meth:`LiveAnalysis.finish` before that point runs
  ``analyze`` itself on the kept records.
* The decoder is byte-driven: the last frame closes when the next byte arrives. When the bus
  has been quiet for longer than the master waits (the timeout in use, else
  ``QUIET_PEEK_NS``), :meth:`update` shows the figures as if the capture ended now (a copy of
  the decoder flushed into a copy of the accumulator), so a slowly polled bus does not show
  the last poll late.

Pure: no clock (the caller passes ``now_ns`` on the record clock), no I/O, no drawing.
"""

from __future__ import annotations

import copy
import threading
from typing import Any

import numpy as np
from buswitness.analysis.pipeline import (
    DELIVERY_SAMPLE_RECORDS,
    AnalysisOptions,
    _accumulator,
    _clock,
    _first_time,
    _protocol,
    analyze,
    assess_delivery,
    delivery_headers,
)
from buswitness.analysis.result import AnalysisResult, build_result
from buswitness.analysis.rolling import ANSWERED, RollingStations
from buswitness.analysis.stationmap import StationMap
from buswitness.analysis.timeout import TimeoutEstimate, given_timeout, infer_timeout
from buswitness.capture.fileformat import FLAG_UNTIMED, Record, RecordBatch

#: Quiet time after which the held last frame is shown, when the master's timeout is not yet known.
QUIET_PEEK_NS = 1_000_000_000
#: Never peek before t3.5 and the largest adapter latency have surely passed (far above both).
PEEK_FLOOR_NS = 50_000_000
#: Records waiting to be decoded beyond which the live figures stop (the decoder cannot keep up).
MAX_PENDING_RECORDS = 200_000


class _KeptSource:
    """Kept record batches as a capture source (``header``, ``iter_batches``) for ``analyze``."""

    def __init__(self, header: Any, batches: list[RecordBatch]) -> None:
        self.header = header
        self.batches = batches
        self.paths: list = []
        self.report = None

    def iter_batches(self):
        yield from self.batches


class LiveAnalysis:
    """Per-station figures of the records seen so far, judged as ``analyze`` judges them."""

    def __init__(self, header: Any, timeout_ms: float | None = None, station_map: StationMap | None = None,
                 sample_records: int = DELIVERY_SAMPLE_RECORDS) -> None:
        from buswitness.decode import Decoder, DecoderConfig

        self.header = header
        self.options = AnalysisOptions(timeout_ms=timeout_ms, station_map=station_map)
        self.smap = station_map or StationMap()
        self._proto = _protocol(header, self.options)
        self._decoder_cls, self._config_cls = Decoder, DecoderConfig
        self._decoder = Decoder(DecoderConfig.from_header(header))
        self._reported = header
        self._acc: Any = None
        self._lock = threading.Lock()
        self._pending: list[Record] = []
        self._kept: list[RecordBatch] | None = []
        self._kept_records = 0
        self._sample_records = sample_records
        self._last_data_ns: int | None = None
        self._dirty = True
        self._can_peek = True
        self.rolling = RollingStations()  #: last response time per station (what the accumulator does not keep)
        self.result: AnalysisResult | None = None
        self.peeked = False  #: the result shows the held last frame (the bus has been quiet long enough)
        self.final = False
        self.disabled_reason: str | None = None
        self.valid_frames = 0

    # -- input (writer thread) --------------------------------------------------------------------
    def add(self, port: int, t_ns: int, data: bytes, flags: int) -> None:
        """Queue one record (cheap; called for every record written)."""
        if self.disabled_reason is not None:
            return
        with self._lock:
            self._pending.append(Record(port, t_ns, data, flags))
            if data:
                self._last_data_ns = t_ns
            if len(self._pending) > MAX_PENDING_RECORDS:
                self._pending = []
                self.disabled_reason = ("live station figures stopped: the analysis could not keep up with the "
                                        "traffic (the recording is not affected)")

    # -- decoding ------------------------------------------------------------------------------------
    def _new_accumulator(self, first_ns: int) -> Any:
        t0_ns, minute0 = _clock(self.header, first_ns)
        return _accumulator(self._reported, t0_ns, self._reported.serial.char_time_s * 1e9, minute0)

    def _feed(self, out: Any, acc: Any = None, live: bool = True) -> Any:
        """Add one decoder output to the live accumulator (``live``) or to ``acc``, as analyze_tables does."""
        if live:
            acc = self._acc
        if acc is None:
            first = _first_time(out.frames, out.transactions, out.events)
            if first is None:
                return None
            acc = self._new_accumulator(first)
            if live:
                self._acc = acc
        acc.add_frames(out.frames)
        acc.add_transactions(out.transactions)
        acc.add_events(out.events)
        if live:
            self.valid_frames += len(out.frames)
            tx = out.transactions
            self.rolling.add_transactions(tx[tx["outcome"].isin(ANSWERED)] if len(tx) else tx)
        return acc

    def _assess(self) -> None:
        """The delivery sample is complete: decode everything kept again with analyze's settings."""
        kept = self._kept or []
        delivery = assess_delivery(_KeptSource(self.header, kept), self._sample_records)
        self._reported, decoding = delivery_headers(self.header, delivery)
        self._decoder = self._decoder_cls(self._config_cls.from_header(decoding))
        self._acc = None
        self.valid_frames = 0
        self.rolling = RollingStations()
        for batch in kept:
            self._feed(self._decoder.feed_batch(batch))
        self._kept = None

    def update(self, now_ns: int | None = None) -> AnalysisResult | None:
        """Decode what arrived since the last call and refresh :attr:`result`; ``now_ns`` on the record clock."""
        if self.disabled_reason is not None or self.final:
            return self.result
        with self._lock:
            pending, self._pending = self._pending, []
            last_data = self._last_data_ns
        try:
            if pending:
                batch = RecordBatch.from_records(pending)
                if self._kept is not None:
                    self._kept.append(batch)
                    self._kept_records += int(((batch.length > 0) & ((batch.flags & FLAG_UNTIMED) == 0)).sum())
                self._feed(self._decoder.feed_batch(batch))
                if self._kept is not None and self._kept_records >= self._sample_records:
                    self._assess()
                self._dirty = True
            quiet = (now_ns is not None and last_data is not None and self._can_peek
                     and now_ns - last_data > self._peek_after_ns())
            if quiet and (self._dirty or not self.peeked):
                try:
                    self.result = self._peek()
                    self.peeked = True
                except Exception:  # noqa: BLE001 -- a decoder that cannot be copied: show what is settled
                    self._can_peek = False
                    self.result = self._judge(self._acc)
                    self.peeked = False
            elif self._dirty or self.result is None:
                self.result = self._judge(self._acc)
                self.peeked = False
            self._dirty = False
        except Exception as exc:  # noqa: BLE001 -- a decoder fault must never stop a recording
            self.disabled_reason = f"live station figures stopped ({type(exc).__name__}: {exc})"
        return self.result

    def finish(self) -> AnalysisResult | None:
        """End of input: the final figures, equal to ``analyze`` of the same records."""
        if self.disabled_reason is not None or self.final:
            return self.result
        self.update()
        try:
            if self._kept is not None:
                self.result = analyze(_KeptSource(self.header, self._kept), self.options)
                self._kept = None
            else:
                self._feed(self._decoder.flush())
                self.result = self._judge(self._acc)
        except Exception as exc:  # noqa: BLE001 -- as in update: the live figures are a convenience
            self.disabled_reason = f"live station figures stopped ({type(exc).__name__}: {exc})"
        self.final = True
        self.peeked = False
        return self.result

    # -- judging -------------------------------------------------------------------------------------
    def timeout(self, acc: Any) -> TimeoutEstimate:
        """The timeout in use: given, or inferred from what was seen so far (as analyze infers it)."""
        if self.options.timeout_ms:
            return given_timeout(self.options.timeout_ms)
        if getattr(self._proto, "answers_judged_on_the_wire", False):
            return TimeoutEstimate(None, "not used", explanation="not used by this protocol")
        if acc is None:
            return infer_timeout(np.zeros(1), None)
        return infer_timeout(acc.move_on, acc.in_time)

    def _judge(self, acc: Any) -> AnalysisResult:
        if acc is None:
            acc = _accumulator(self._reported, int(self.header.start_monotonic_ns or 0),
                               self._reported.serial.char_time_s * 1e9, 0)  # as analyze_tables with no traffic
        result = build_result(self._reported, [], None, acc.figures(copy=False), self.smap, self.timeout(acc))
        result.protocol = self._proto.name
        return result

    def _peek(self) -> AnalysisResult:
        """The figures as if the capture ended now: a flushed copy of the decoder into a copy of the figures."""
        out = copy.deepcopy(self._decoder).flush()
        return self._judge(self._feed(out, copy.deepcopy(self._acc), live=False))

    def _peek_after_ns(self) -> float:
        timeout_ms = self.result.timeout.timeout_ms if self.result is not None else self.options.timeout_ms
        return max(QUIET_PEEK_NS if timeout_ms is None else timeout_ms * 1e6 * 1.5, PEEK_FLOOR_NS)
