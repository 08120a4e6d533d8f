"""``analyze``: stream a capture through the decoder into the accumulators, in bounded memory.

Decoder output is gathered into blocks of about ``block_rows`` rows, each block updates the
accumulators and the exports, then is dropped: memory depends on the block size and the
number of minutes, not on the capture's length.
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Iterable, Iterator
from dataclasses import dataclass
from pathlib import Path

import pandas as pd
from buswitness.analysis.exports import TableExporter, utc_anchor_of
from buswitness.analysis.figures import NS_PER_MIN, Accumulator
from buswitness.analysis.result import AnalysisResult, build_result
from buswitness.analysis.stationmap import StationMap
from buswitness.analysis.timeout import given_timeout, infer_timeout
from buswitness.capture.fileformat import CaptureHeader, ReadReport

#: Rows gathered before a block is processed: large enough that per-block overhead is small.
BLOCK_ROWS = 200_000


@dataclass
class AnalysisOptions:
    """What the user asked of the analysis."""

    timeout_ms: float | None = None
    station_map: StationMap | None = None
    csv_dir: str | None = None
    parquet_dir: str | None = None
    progress: bool | None = None  #: None: a progress bar when stderr is a terminal
    block_rows: int = BLOCK_ROWS
    port_roles: dict[int, str] | None = None  #: what each port hears; None: as the capture header says


def _empty_tables() -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    frames = pd.DataFrame({c: pd.Series(dtype="int64") for c in ("t_start_ns", "t_end_ns", "t_end_lo_ns",
                                                                  "t_end_hi_ns", "port", "address", "function",
                                                                  "length")})
    frames["direction"] = pd.Series(dtype=str)
    frames["raw"] = pd.Series(dtype=object)
    tx = pd.DataFrame({c: pd.Series(dtype="int64") for c in ("t_request_end_ns", "t_response_start_ns", "station",
                                                              "function", "exception_code")})
    tx["outcome"] = pd.Series(dtype=str)
    tx["retry"] = pd.Series(dtype=bool)
    for c in ("response_ms", "response_ms_low", "response_ms_high"):
        tx[c] = pd.Series(dtype="float64")
    tx["request_raw"] = pd.Series(dtype=object)
    tx["response_raw"] = pd.Series(dtype=object)
    events = pd.DataFrame({c: pd.Series(dtype="int64") for c in ("t_ns", "station", "port")})
    events["kind"] = pd.Series(dtype=str)
    events["raw"] = pd.Series(dtype=object)
    events["detail"] = pd.Series(dtype=str)
    return frames, tx, events


#: Traffic starting longer than this after the stated capture start gets its per-minute series
#: started at the minute of its first frame, not at the capture start (no day of empty minutes).
SERIES_LEAD_MAX_NS = 1440 * NS_PER_MIN


def _clock(header: CaptureHeader, first_ns: int) -> tuple[int, int]:
    """(capture start on the record clock, first minute of the per-minute series).

    Every reported time counts from the start the file states (the header's
    ``start_monotonic_ns``; 0 for hex text, whose times count from the capture start), never
    from the first decoded frame, so exported times line up with the user's own log. The
    per-minute series starts at the capture start too, unless the traffic begins before it
    or more than a day after it: then at the whole minute of the first frame.
    """
    start = int(header.start_monotonic_ns or 0)
    lead = first_ns - start
    if -1_000_000_000 <= lead <= SERIES_LEAD_MAX_NS:
        return start, 0
    return start, int(lead // NS_PER_MIN)


def _accumulator(header: CaptureHeader, t0_ns: int, char_ns: float, minute0: int) -> Accumulator:
    """An accumulator whose per-minute rows are whole minutes of UTC when the header states the wall clock."""
    anchor = utc_anchor_of(header.start_utc)
    utc0 = None if anchor is None else int(pd.Timestamp(anchor).value)
    first_minute = (utc0 or 0) // NS_PER_MIN + minute0
    return Accumulator(t0_ns=t0_ns, char_ns=char_ns, minute0=first_minute, utc0_ns=utc0,
                       capture_id=str(getattr(header, "capture_id", "") or ""))


def _first_time(frames: pd.DataFrame, tx: pd.DataFrame, events: pd.DataFrame) -> int | None:
    candidates = [int(t[c].min()) for t, c in ((frames, "t_start_ns"), (tx, "t_request_end_ns"), (events, "t_ns"))
                  if len(t)]
    return min(candidates) if candidates else None


def analyze_tables(header: CaptureHeader, outputs: Iterable, options: AnalysisOptions | None = None,
                   paths: list | None = None, damage: ReadReport | None = None) -> AnalysisResult:
    """Analyse decoder output (anything with ``.frames``, ``.transactions``, ``.events``) block by block."""
    options = options or AnalysisOptions()
    smap = options.station_map or StationMap()
    char_ns = header.serial.char_time_s * 1e9
    acc: Accumulator | None = None
    exporter: TableExporter | None = None
    pending: list = []
    rows = 0
    empty = _empty_tables()

    def process() -> None:
        nonlocal acc, exporter, pending, rows
        frames = pd.concat([p.frames for p in pending] or [empty[0]], ignore_index=True)
        tx = pd.concat([p.transactions for p in pending] or [empty[1]], ignore_index=True)
        events = pd.concat([p.events for p in pending] or [empty[2]], ignore_index=True)
        pending, rows = [], 0
        if acc is None:
            first = _first_time(frames, tx, events)
            if first is None:
                return
            t0, minute0 = _clock(header, first)
            acc = _accumulator(header, t0, char_ns, minute0)
            if options.csv_dir or options.parquet_dir:
                exporter = TableExporter(acc.t0_ns, utc_anchor_of(header.start_utc), options.csv_dir,
                                         options.parquet_dir)
        acc.add_frames(frames)
        acc.add_transactions(tx)
        acc.add_events(events)
        if exporter is not None:
            exporter.write(frames, tx, events)

    try:
        for out in outputs:
            pending.append(out)
            rows += len(out.frames) + len(out.transactions) + len(out.events)
            if rows >= options.block_rows:
                process()
        process()
        if acc is None:
            acc = _accumulator(header, int(header.start_monotonic_ns or 0), char_ns, 0)
            if options.csv_dir or options.parquet_dir:
                exporter = TableExporter(acc.t0_ns, utc_anchor_of(header.start_utc), options.csv_dir,
                                         options.parquet_dir)
        if exporter is not None:
            exporter.close(*empty)
    except BaseException:
        if exporter is not None:
            exporter.abort()
        raise
    timeout = given_timeout(options.timeout_ms) if options.timeout_ms else infer_timeout(acc.move_on, acc.in_time)
    return build_result(header, paths or [], damage, acc.figures(), smap, timeout)


def _decoded(source, cfg, on_batch: Callable[[int], None]) -> Iterator:
    from buswitness.decode import Decoder
    decoder = Decoder(cfg)
    for batch in source.iter_batches():
        on_batch(int(batch.payload.nbytes) + 12 * len(batch))
        yield decoder.feed_batch(batch)
    yield decoder.flush()


def analyze(source, options: AnalysisOptions | None = None) -> AnalysisResult:
    """Decode and analyse an opened capture source (see ``buswitness.capture.sources.open_capture``)."""
    from buswitness.decode import DecoderConfig
    options = options or AnalysisOptions()
    cfg = DecoderConfig.from_header(source.header, port_roles=options.port_roles)
    show = sys.stderr.isatty() if options.progress is None else options.progress
    paths = list(getattr(source, "paths", []))
    total = sum(Path(p).stat().st_size for p in paths if Path(p).exists()) or None
    if not show:
        result = analyze_tables(source.header, _decoded(source, cfg, lambda n: None), options, paths,
                                getattr(source, "report", None))
    else:
        from rich.console import Console
        from rich.progress import BarColumn, DownloadColumn, Progress, TextColumn, TimeRemainingColumn
        with Progress(TextColumn("analysing"), BarColumn(), DownloadColumn(), TimeRemainingColumn(),
                      console=Console(stderr=True), transient=True) as progress:
            task = progress.add_task("analyse", total=total)
            result = analyze_tables(source.header, _decoded(source, cfg, lambda n: progress.advance(task, n)),
                                    options, paths, getattr(source, "report", None))
    result.findings = evaluate_findings(result)
    return result


def evaluate_findings(result: AnalysisResult) -> list:
    """The findings rules' verdict, or no findings when the rules are not part of this build."""
    try:
        from buswitness.analysis.findings import evaluate
    except ModuleNotFoundError as exc:
        if exc.name != "buswitness.analysis.findings":
            raise
        return []
    from buswitness.analysis.finding import ranked
    return ranked(list(evaluate(result)))
