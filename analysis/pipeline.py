"""``analyze``: stream a capture through the decoder into the accumulators, in bounded memory.

Decoder output is gathered into blocks of about ``block_rows`` rows, each block updates the
accumulators and the exports, then is dropped: memory depends on the block size and the
number of minutes, not on the capture's length.
"""

from __future__ import annotations

import contextlib
import copy
from collections.abc import Callable, Iterable, Iterator, Sequence
from dataclasses import dataclass, fields, replace
from pathlib import Path

import numpy as np
import pandas as pd
from buswitness.analysis.exports import utc_anchor_of
from buswitness.analysis.figures import NS_PER_MIN, Accumulator
from buswitness.analysis.finding import Finding, ranked
from buswitness.analysis.result import AnalysisResult, build_result
from buswitness.analysis.sinks import SinkContext
from buswitness.analysis.stationmap import StationMap
from buswitness.analysis.timeout import TimeoutEstimate, given_timeout, infer_timeout
from buswitness.capture.fileformat import CaptureHeader, ReadReport
from buswitness.decode.tables import DecodeOutput

#: Rows gathered before a block is processed: large enough that per-block overhead is small.
BLOCK_ROWS = 200_000
#: Records read ahead to estimate what the header does not state (adapter latency, character pitch):
#: bounded, so memory stays flat however long the capture.
DELIVERY_SAMPLE_RECORDS = 300_000


@dataclass
class AnalysisOptions:
    """What the user asked of the analysis."""

    timeout_ms: float | None = None
    station_map: StationMap | None = None
    csv_dir: str | None = None
    parquet_dir: str | None = None
    progress: bool | None = None  #: kept for callers; the bar is the command line's (``analyze(progress=...)``)
    block_rows: int = BLOCK_ROWS
    port_roles: dict[int, str] | None = None  #: what each port hears; None: as the capture header says
    protocol: str | None = None  #: field protocol (buswitness.protocols); None: as the capture header says
    #: keep and use the decoded cache next to the capture (analysis/decodecache.py)
    cache: bool = False
    #: processes decoding segments of a long capture at once (analysis/segments.py); None: every core
    jobs: int | None = None
    notice: Callable[[str], None] | None = None  #: one-line notices (cache skipped, seams decoded serially)


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


def _option_sinks(options: AnalysisOptions) -> list:
    """The table sinks the older options ask for (``csv_dir``, ``parquet_dir``)."""
    out: list = []
    if options.csv_dir:
        from buswitness.analysis.sinks.csv import CsvSink
        out.append(CsvSink(options.csv_dir))
    if options.parquet_dir:
        from buswitness.analysis.sinks.parquet import ParquetSink
        out.append(ParquetSink(options.parquet_dir))
    return out


def analyze_tables(header: CaptureHeader, outputs: Iterable, options: AnalysisOptions | None = None,
                   paths: list | None = None, damage: ReadReport | None = None, sinks: Sequence = (),
                   close_sinks: bool = True) -> AnalysisResult:
    """Analyse decoder output (anything with ``.frames``, ``.transactions``, ``.events``) block by block.

    Every block goes to the ``sinks`` too (plus the CSV and Parquet sinks the options ask for).
    With ``close_sinks`` they are closed on the finished result (findings evaluated first);
    ``analyze`` closes them itself. Any failure aborts every sink: nothing half written stays.
    """
    options = options or AnalysisOptions()
    char_ns = header.serial.char_time_s * 1e9
    proto = _protocol(header, options)
    extra = proto.new_figures(header.serial) if hasattr(proto, "new_figures") else None
    acc: Accumulator | None = None
    pending: list = []
    rows = 0
    empty = _empty_tables()
    sinks = _option_sinks(options) + list(sinks)

    def start(t0: int, minute0: int) -> Accumulator:
        made = _accumulator(header, t0, char_ns, minute0)
        context = SinkContext(header=header, t0_ns=made.t0_ns, utc0_ns=made.utc0_ns,
                              paths=tuple(str(p) for p in paths or []))
        for sink in sinks:
            sink.open(context)
        return made

    def process() -> None:
        nonlocal acc, pending, rows
        if pending and all(isinstance(p, DecodeOutput) for p in pending):
            # the decoder's columns joined first: one table each per block, and a DataFrame only
            # for a reader that needs one (the figures read the numpy columns)
            joined = DecodeOutput.concat(pending)
            frames, tx, events = joined.to_frames() if sinks or extra is not None else joined.columns()
        else:
            frames = pd.concat([p.frames for p in pending] or [empty[0]], ignore_index=True)
            tx = pd.concat([p.transactions for p in pending] or [empty[1]], ignore_index=True)
            events = pd.concat([p.events for p in pending] or [empty[2]], ignore_index=True)
        pending, rows = [], 0
        if acc is None:
            first = _first_time(frames, tx, events)
            if first is None:
                return
            acc = start(*_clock(header, first))
        acc.add_frames(frames)
        acc.add_transactions(tx)
        acc.add_events(events)
        if extra is not None:
            extra.add(frames, tx, events)
        for sink in sinks:
            sink.write(frames, tx, events)

    try:
        for out in outputs:
            pending.append(out)
            rows += out.rows if isinstance(out, DecodeOutput) else len(out.frames) + len(out.transactions) + len(out.events)
            if rows >= options.block_rows:
                process()
        process()
        if acc is None:
            acc = start(int(header.start_monotonic_ns or 0), 0)
        protocol_figures = None if extra is None else {**extra.result(), "findings": extra.findings()}
        result = judged_result(header, acc.figures(copy=False), options, paths, damage, proto, protocol_figures)
        result.sinks = sinks
        if close_sinks and sinks:
            result.findings = evaluate_findings(result)
            close(result)
    except BaseException:
        abort(sinks)
        raise
    return result


def judged_result(header: CaptureHeader, figures, options: AnalysisOptions, paths: list | None,
                  damage: ReadReport | None, proto, protocol_figures: dict | None) -> AnalysisResult:
    """The result of unjudged ``figures``: the timeout given or inferred, then judged against it once."""
    smap = options.station_map or StationMap()
    if options.timeout_ms:
        timeout = given_timeout(options.timeout_ms)
    elif getattr(proto, "answers_judged_on_the_wire", False):
        timeout = TimeoutEstimate(None, "not used", explanation=(
            f"{proto.label}: only the token holder asks and it waits for its answer, so every answer on the "
            f"wire is one the master accepted (an unanswered request shows as a retry or the next request)"))
    else:
        timeout = infer_timeout(figures.move_on, figures.in_time)
    result = build_result(header, paths or [], damage, figures, smap, timeout)
    result.protocol = proto.name
    if protocol_figures is not None:
        result.protocol_figures = protocol_figures
    return result


def close(result: AnalysisResult) -> list[Path]:
    """Close the result's sinks on it; return every file written."""
    written: list[Path] = []
    for sink in result.sinks:
        written.extend(sink.close(result))
    result.written = written
    return written


def abort(sinks: Sequence) -> None:
    for sink in sinks:
        with contextlib.suppress(Exception):
            sink.abort()


def protocol_findings(result: AnalysisResult) -> list[Finding]:
    """The protocol's own findings (decode/protocols/<name>/figures.py) as findings of the report."""
    label = "slave" if result.protocol == "profibus-dp" else "station"
    return [Finding(rule=f["kind"].replace("_", "-"), severity="warning", statement=f["text"], station=f["station"],
                    station_label=f"{label} {f['station']}", evidence={"protocol": result.protocol})
            for f in result.protocol_figures.get("findings", [])]


def _protocol(header: CaptureHeader, options: AnalysisOptions):
    """The protocol object the options or the capture header name (buswitness.protocols)."""
    from buswitness.decode.protocols import get
    from buswitness.protocols import DEFAULT
    return get(options.protocol or str(header.extra.get("protocol", DEFAULT)))


def _decoded(source, cfg, on_batch: Callable[[int], None], contradictions: list | None = None) -> Iterator:
    from buswitness.decode import Decoder
    from buswitness.decode.decoder import joined_batches
    decoder = Decoder(cfg)

    def read() -> Iterator:
        for batch in source.iter_batches():
            on_batch(int(batch.payload.nbytes) + 12 * len(batch))
            yield batch

    # a second's block of records is too little for one decoder call: join blocks (same tables)
    for batch in joined_batches(read()):
        yield decoder.feed_batch(batch)
    yield decoder.flush()
    if contradictions is not None:
        contradictions.extend((p, port.timeline.contradictions) for p, port in sorted(decoder.ports.items()))


class ReadOnce:
    """An imported source (hex text, raw bytes) parsed once for both passes of an analysis.

    The delivery sample's batches (at most ``DELIVERY_SAMPLE_RECORDS`` records) are kept and
    handed to the analysis pass first, then the rest of the same reading: parsing text costs as
    much as decoding it, and a second parse of the sample would double it for an hour's log.
    The damage report is the source's own, filled once as the lines are read.
    """

    def __init__(self, source) -> None:
        self._source = source
        self._rest = iter(source.iter_batches())
        self._head: list = []
        self._handed = False

    def __getattr__(self, name: str):
        return getattr(self._source, name)

    def sample_batches(self) -> Iterator:
        """The batches from the start, read on as far as the caller goes (all kept)."""
        yield from list(self._head)
        for batch in self._rest:
            self._head.append(batch)
            yield batch

    def iter_batches(self) -> Iterator:
        if self._handed:
            raise RuntimeError("this source is read once: open the capture again to read it again")
        self._handed = True
        head, self._head = self._head, []
        yield from head
        yield from self._rest


def _reads_cheaply(source) -> bool:
    """True for a capture file (reading it twice costs little); an importer parses text (ReadOnce)."""
    from buswitness.capture.fileformat import CaptureReader
    return isinstance(source, (CaptureReader, ReadOnce)) or not hasattr(source, "iter_batches")


def _sample_records(source, limit: int) -> dict[int, tuple[np.ndarray, np.ndarray]]:
    """Read times and sizes of the first ``limit`` records with bytes, per port (a first pass).

    The source's damage report is left as it was: the analysis pass reads everything again
    (a :class:`ReadOnce` source keeps the batches read here for it, and its report as read).
    """
    from buswitness.capture.fileformat import FLAG_UNTIMED
    once = isinstance(source, ReadOnce)
    report = None if once else getattr(source, "report", None)
    saved = copy.deepcopy(report)
    t: dict[int, list] = {}
    n: dict[int, list] = {}
    seen = 0
    batches = source.sample_batches() if once else source.iter_batches()
    try:
        for batch in batches:
            keep = (batch.length > 0) & ((batch.flags & FLAG_UNTIMED) == 0)
            for port in np.unique(batch.port[keep]).tolist():
                sel = keep & (batch.port == port)
                t.setdefault(port, []).append(batch.t_ns[sel])
                n.setdefault(port, []).append(batch.length[sel])
            seen += int(keep.sum())
            if seen >= limit:
                break
    finally:
        close = getattr(batches, "close", None)
        if close is not None:
            close()
        if report is not None:
            for f in fields(report):
                setattr(report, f.name, getattr(saved, f.name))
    return {p: (np.concatenate(t[p])[:limit], np.concatenate(n[p])[:limit]) for p in t}


def assess_delivery(source, limit: int = DELIVERY_SAMPLE_RECORDS, protocol: str | None = None) -> list:
    """Per port: the adapter latency (estimated where the header does not state it) and the measured
    character pitch (``buswitness.decode.delivery``), from a bounded first pass over the records.

    The pitch is measured for Modbus only: its model reads whole frames from back-to-back reads, and
    the short Profibus telegrams with their idle gaps at 1.5 Mbit/s read as slow characters.
    """
    from buswitness.decode.delivery import assess_port
    from buswitness.protocols import DEFAULT, canonical
    header = source.header
    name = canonical(protocol or str(header.extra.get("protocol", DEFAULT)))
    modbus = name.startswith("modbus")
    if header.timing == "none":
        return []
    samples = _sample_records(source, limit)
    out = []
    for p in header.ports:
        t, n = samples.get(p.id, (np.zeros(0, np.int64), np.zeros(0, np.int64)))
        stated = p.latency_ms if p.latency_ms else None
        out.append(assess_port(p.id, t, n, header.serial, stated, p.latency_source, measure_pitch_too=modbus))
    return out


def delivery_headers(header: CaptureHeader, delivery: list) -> tuple[CaptureHeader, CaptureHeader]:
    """(the header as reported, the header the decoder works with).

    Both carry the estimated latencies (``latency_source: estimated``); the decoder's also carries
    the character format the measured pitch shows where it disagrees with the file's.
    """
    by_port = {d.port: d for d in delivery}
    ports = []
    for p in header.ports:
        d = by_port.get(p.id)
        if d is not None and d.estimate is not None and d.latency_source == "estimated":
            p = replace(p, latency_ms=d.latency_ms, latency_source="estimated")
        ports.append(p)
    reported = replace(header, ports=ports)
    measured = next((d.measured_format for d in delivery if d.measured_format is not None), None)
    return reported, (replace(reported, serial=measured) if measured is not None else reported)


def analyze(source, options: AnalysisOptions | None = None, sinks: Sequence = (),
            progress: Callable[[int, int | None], None] | None = None) -> AnalysisResult:
    """Decode and analyse an opened capture source (see ``buswitness.capture.sources.open_capture``).

    Each of ``sinks`` (``buswitness.analysis.sinks``) gets the tables as they stream and the
    finished result. ``progress(done, total)`` is called as the input is read (bytes; total
    None when unknown): the analysis draws nothing itself, the command line draws the bar.
    With ``options.cache`` the decoded cache next to the capture (analysis/decodecache.py) is
    used when it matches, and left for the next run when it does not.
    """
    from buswitness.decode import DecoderConfig
    options = options or AnalysisOptions()
    paths = list(getattr(source, "paths", []))
    total = sum(Path(p).stat().st_size for p in paths if Path(p).exists()) or None
    cache = _open_cache(source, options, paths)
    if cache is not None and cache.hit is not None and not needs_tables(_option_sinks(options) + list(sinks)):
        if progress is not None:
            progress(total or 0, total)
        return _finish(_from_cache(source, options, cache, paths, sinks), cache)
    if not _reads_cheaply(source):
        source = ReadOnce(source)
    delivery = assess_delivery(source, protocol=options.protocol)
    header, decoding = delivery_headers(source.header, delivery)
    cfg = DecoderConfig.from_header(decoding, port_roles=options.port_roles, protocol=options.protocol)
    result = _decode_in_segments(source, options, header, cfg, paths, sinks, delivery)
    if result is not None:
        if progress is not None:
            progress(total or 0, total)
        if cache is not None:
            cache.keep(result)
        return _finish(result, cache)
    done = 0
    crossed: list = []

    def on_batch(n: int) -> None:
        nonlocal done
        done += n
        if progress is not None:
            progress(done, total)

    result = analyze_tables(header, _decoded(source, cfg, on_batch, crossed), options, paths,
                            getattr(source, "report", None), sinks, close_sinks=False)
    result.delivery = [d.to_dict() for d in delivery]
    for entry in result.delivery:
        entry["timing_contradictions"] = dict(crossed).get(entry["port"], 0)
    if cache is not None:
        cache.keep(result)
    return _finish(result, cache)


def _decode_in_segments(source, options: AnalysisOptions, header: CaptureHeader, cfg, paths: list,
                        sinks: Sequence, delivery: list) -> AnalysisResult | None:
    """The result from segments decoded on several cores (analysis/segments.py); None: decode in one pass."""
    from buswitness.analysis import segments
    jobs = segments.jobs_for(options, source, _protocol(header, options),
                             needs_tables(_option_sinks(options) + list(sinks)))
    if jobs <= 1:
        return None
    done = segments.decode_parallel(source, header, cfg, jobs, options.notice or (lambda text: None))
    if done is None:
        return None
    result = _result_of_figures(header, done.figures, options, paths, done.report, None, sinks)
    result.delivery = [d.to_dict() for d in delivery]
    for entry in result.delivery:
        entry["timing_contradictions"] = done.contradictions.get(entry["port"], 0)
    return result


def _finish(result: AnalysisResult, cache) -> AnalysisResult:
    if cache is not None:
        result.part_digests = cache.digests
    try:
        result.findings = evaluate_findings(result)
        close(result)
    except BaseException:
        abort(result.sinks)
        raise
    return result


def needs_tables(sinks: Sequence) -> bool:
    """True when a sink reads the decoded rows themselves (CSV, Parquet, the fleet dataset)."""
    from buswitness.analysis.sinks import Sink
    return any(type(s).write is not Sink.write for s in sinks)


class _Cache:
    """The decoded cache of one run: its key, what it held, and how to keep this run's figures."""

    def __init__(self, path: Path, key: str, digests: list, hit, notice: Callable[[str], None]) -> None:
        self.path, self.key, self.digests, self.hit, self.notice = path, key, digests, hit, notice

    def keep(self, result: AnalysisResult) -> None:
        from buswitness.analysis import decodecache
        if result.unjudged is None:
            return
        if not decodecache.writable(self.path):
            self.notice(f"decoded cache not written: {self.path.parent} is not writable (the next run decodes again)")
            return
        decodecache.store(self.path, self.key, result, self.notice)


def _open_cache(source, options: AnalysisOptions, paths: list) -> _Cache | None:
    """The run's cache (None when off or impossible here), with the sidecar's content when it matches."""
    if not options.cache or not paths:
        return None
    from buswitness.analysis import decodecache
    from buswitness.protocols import DEFAULT, canonical
    notice = options.notice or (lambda text: None)
    if not decodecache.have_pyarrow():
        notice("decoded cache off: pyarrow is not installed (pip install 'buswitness[parquet]')")
        return None
    try:
        digests = decodecache.part_digests(paths)
    except OSError as exc:
        notice(f"decoded cache off: a capture file cannot be read whole ({exc.strerror})")
        return None
    protocol = canonical(options.protocol or str(source.header.extra.get("protocol", DEFAULT)))
    key = decodecache.cache_key(source, digests, protocol, options.port_roles)
    path = decodecache.sidecar_path(paths)
    return _Cache(path, key, digests, decodecache.load(path, key, notice), notice)


def _from_cache(source, options: AnalysisOptions, cache: _Cache, paths: list, sinks: Sequence) -> AnalysisResult:
    """The result from the cached figures: judged against this run's timeout, with this run's station map."""
    from buswitness.analysis import decodecache
    hit = cache.hit
    stated = {int(pid): (lat, src) for pid, lat, src in hit.latencies}
    ports = [replace(p, latency_ms=stated[p.id][0], latency_source=stated[p.id][1]) if p.id in stated else p
             for p in source.header.ports]
    header = replace(source.header, ports=ports)
    damage = decodecache.damage_report(hit.damage)
    if damage is not None and getattr(source, "report", None) is not None:
        source.report = damage
    result = _result_of_figures(header, hit.figures, options, paths, damage, hit.protocol_figures or None, sinks)
    result.delivery = hit.delivery
    return result


def _result_of_figures(header: CaptureHeader, figures, options: AnalysisOptions, paths: list,
                       damage: ReadReport | None, protocol_figures: dict | None, sinks: Sequence) -> AnalysisResult:
    """The result of figures made elsewhere (the decoded cache, segments decoded at once), sinks opened."""
    proto = _protocol(header, options)
    sinks = _option_sinks(options) + list(sinks)
    context = SinkContext(header=header, t0_ns=figures.t0_ns, utc0_ns=figures.utc0_ns,
                          paths=tuple(str(p) for p in paths))
    try:
        for sink in sinks:
            sink.open(context)
        result = judged_result(header, figures, options, paths, damage, proto, protocol_figures)
        result.sinks = sinks
    except BaseException:
        abort(sinks)
        raise
    return result


def evaluate_findings(result: AnalysisResult) -> list:
    """The findings rules' verdict, or no findings when the rules are not part of this build."""
    try:
        from buswitness.analysis.findings import evaluate
    except ModuleNotFoundError as exc:
        if exc.name != "buswitness.analysis.findings":
            raise
        return protocol_findings(result)
    return ranked(list(evaluate(result)) + protocol_findings(result))
