"""The analysis result: per-station and bus figures read out of plain ``Figures``, plus context.

Everything a report shows comes from one ``AnalysisResult``, so the dashboard, the evidence
report, ``summary.json`` and the text summary of ``analyze`` always agree. The result holds
plain data only (``figures``, judged against the timeout, and ``unjudged``, which merges):
``merge_results`` of the results of the parts of a rotated capture, of several nights or of
several ports equals the analysis of them all together.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from datetime import datetime, timedelta, timezone

import numpy as np
from buswitness import __version__
from buswitness.analysis.figures import (
    EVENT_KINDS,
    FAILURES_PER_STATION,
    MINUTE_COLUMNS,
    NS_PER_MIN,
    OUTCOMES,
    Figures,
    above,
    minute_bands,
    response_figures,
)
from buswitness.analysis.finding import Finding
from buswitness.analysis.histogram import COARSE, FINE, quantile, quantiles_rows
from buswitness.analysis.stationmap import StationMap
from buswitness.analysis.timeout import TimeoutEstimate
from buswitness.capture.fileformat import CaptureHeader, ReadReport
from buswitness.decode.functions import EXCEPTION_NAMES as _DECODER_EXCEPTION_NAMES

_O = {name: i for i, name in enumerate(OUTCOMES)}
_K = {name: i for i, name in enumerate(EVENT_KINDS)}

#: Exception codes and their meaning (MB Application Protocol V1.1b3 p48-49), from the decoder's table.
EXCEPTION_NAMES = {code: name.lower() for code, name in _DECODER_EXCEPTION_NAMES.items()}


@dataclass
class StationFigures:
    """One station's figures over the whole capture (counts exact, times in ms)."""

    address: int
    name: str
    label: str
    position_m: float | None
    notes: str
    requests: int          #: requests addressed to it
    answered: int          #: valid answers in time (ok + exception)
    ok: int
    timeouts: int
    late: int
    exceptions: int
    exceptions_by_code: dict
    corrupt: int
    ambiguous: int         #: an identical frame followed that may be its echo answer or the master's retry
    crc_errors: int        #: frames of its that failed the CRC check: crc_error and truncated events
    collisions: int
    retries: int
    response_ms: dict      #: min, p50, p95, p99, max (midpoints)
    response_ms_interval: dict  #: p50/p95/p99 -> [low, high] the timestamps allow
    timing_halfwidth_ms: float | None  #: median half-width of its response-time intervals
    answers_over_timeout: int | None   #: answers (ok, exception or late) taking longer than the timeout
    poll_cycle_ms: dict    #: p50, p95 of the interval between requests to it
    waiting_s: float       #: bus time the master spent waiting on its unanswered requests
    availability: float | None  #: answered / requests
    events: dict           #: event kind -> count
    functions: dict        #: request function code -> count
    device_ids: list
    late_listed: int       #: late answers listed (all of them up to the cap)

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass
class BusFigures:
    """The line as a whole."""

    duration_s: float
    frames: int
    bytes: int
    busy_s: float
    utilisation: float | None    #: share of time the line carried bytes (0..1)
    requests: int
    broadcasts: int
    events: dict                 #: kind -> count, every station and none
    unattributed_events: dict    #: kind -> count of events tied to no station
    functions: dict              #: function code -> requests
    gap_ms: dict                 #: p50, p95, max of the silences between frames
    largest_gaps: list           #: [{"t_s", "gap_ms"}], longest first
    unknown_outcomes: int
    stray_addresses: dict        #: address -> requests, for addresses too rarely polled to be stations (noise)

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass
class AnalysisResult:
    """What ``analyze`` found in one capture."""

    header: CaptureHeader
    paths: list
    damage: ReadReport | None
    figures: Figures        #: judged against the timeout: what every report shows
    station_map: StationMap
    timeout: TimeoutEstimate
    stations: list[StationFigures]
    bus: BusFigures
    findings: list[Finding] = field(default_factory=list)
    #: per port: adapter latency used and how it was found, measured character pitch (decode/delivery.py)
    delivery: list[dict] = field(default_factory=list)
    tool_version: str = __version__
    analysed_utc: str = ""
    #: the field protocol (buswitness.protocols) and its own figures (decode/protocols/<name>/figures.py)
    protocol: str = "modbus-rtu"
    protocol_figures: dict = field(default_factory=dict)
    unjudged: Figures | None = None  #: the same before judging: what ``merge_results`` adds together
    #: size and SHA-256 of each capture file when this run read them whole (analysis/decodecache.py)
    part_digests: list = field(default_factory=list)
    headers: list = field(default_factory=list)  #: every capture's header, when merged from several
    sinks: list = field(default_factory=list, repr=False)  #: the outputs analyze fed (analysis/sinks)
    written: list = field(default_factory=list)  #: files the sinks wrote

    @property
    def acc(self) -> Figures:
        """The plain figures (the name of the accumulator this once held, kept for callers)."""
        return self.figures

    @property
    def t0_ns(self) -> int:
        return self.figures.t0_ns

    def failure_rows(self, address: int) -> list[dict]:
        """The first timeouts and corrupt answers of a station kept as examples, in time order."""
        return list(self.figures.failures.get(address, []))

    def slowest_rows(self, address: int) -> list[dict]:
        """The slowest answers kept for a station, slowest first."""
        return [r for _, r in sorted(self.figures.worst.get(address, []), key=lambda x: -x[0])]

    def response_counts(self, address: int) -> np.ndarray:
        """The station's response-time histogram (midpoints, ``histogram.FINE`` bins)."""
        return self.figures.rt_mid[address]

    def unpolled_answers(self) -> np.ndarray:
        """Per address: answers from it (orphan or unexpected responder) and requests to it, (256, 2)."""
        kinds = [_K["orphan_response"], _K["unexpected_responder"]]
        return np.stack([self.figures.events[1:, kinds].sum(axis=1), self.figures.outcomes.sum(axis=1)], axis=1)

    def station(self, address: int) -> StationFigures | None:
        """The figures of one station; None when the master polled stations, but not ``address``.

        A capture in which no request to any station could be read (the no-traffic, no-valid-frames
        and unreadable-line findings) says nothing of any address: every station has zero figures
        there, so a report on one can still be written, and says why it is empty."""
        for s in self.stations:
            if s.address == address:
                return s
        if not any(s.requests for s in self.stations):
            return silent_station(address, self.station_map)
        return None

    @property
    def series_start_s(self) -> float:
        """Where minute 0 of the per-minute series begins, in seconds since the capture start."""
        return self.minute_start_s(0)

    def minute_start_s(self, minute: int) -> float:
        """Start of a row of the per-minute series, in seconds since the capture start.

        Rows are whole minutes of UTC when the capture states its wall clock, so row 0 may begin
        up to a minute before the capture start."""
        return (self.figures.record_ns_of_minute(minute) - self.figures.t0_ns) / 1e9

    def minute_utc_ns(self, minute: int) -> int | None:
        """UTC (ns since 1970) where row ``minute`` of the per-minute series begins, None without a wall clock."""
        f = self.figures
        return None if f.utc0_ns is None else (f.minute0 + minute) * NS_PER_MIN

    @property
    def span_s(self) -> tuple[float, float]:
        """The recorded stretch, in seconds since the capture start: from the start (or the first frame when
        it comes before, or a day or more after) to the end of the last frame."""
        acc = self.figures
        if acc.last_ns is None:
            return self.series_start_s, self.series_start_s
        start_ns = max(acc.t0_ns, acc.record_ns_of_minute(0))
        start = (min(start_ns, acc.first_ns if acc.first_ns is not None else start_ns) - acc.t0_ns) / 1e9
        return start, (acc.last_ns - acc.t0_ns) / 1e9

    def utc_at(self, t_s: float) -> str:
        """Wall-clock UTC of a time since the capture start, when the header anchors it."""
        start = self.header.start_datetime()
        if start is None:
            return ""
        if start.tzinfo is None:
            start = start.replace(tzinfo=timezone.utc)
        return (start + timedelta(seconds=t_s)).astimezone(timezone.utc).isoformat(timespec="milliseconds")

    def minutes(self) -> int:
        return self.figures.minutes

    def station_series(self, address: int) -> dict:
        """Per-minute counts and response-time bands of one station."""
        n = self.minutes()
        series = self.figures.station_minutes.get(address)
        data = np.zeros((n, len(MINUTE_COLUMNS)), np.int64)
        if series is not None:
            data[: len(series)] = series
        out = {name: data[:, i].tolist() for i, name in enumerate(MINUTE_COLUMNS)}
        bands = minute_bands(self.figures, address)
        for key, values in bands.items():
            padded = list(values) + [float("nan")] * (n - len(values))
            out["rt_" + key] = padded
        return out

    def response_bands(self, address: int, k: int = 1, bins: int | None = None) -> dict:
        """p50, p95 and max response time of one station in bins of ``k`` minutes (NaN where it did not answer).

        The bins' histograms are added before the quantiles are read, so a 15-minute p95 is the p95
        of those 15 minutes, not a mean of per-minute ones."""
        n = self.minutes()
        bins = max(1, -(-n // k)) if bins is None else bins
        out = {key: np.full(bins, np.nan) for key in ("p50", "p95", "max")}
        counts = self.figures.station_minute_rt.get(address)
        mx = self.figures.station_minute_max.get(address)
        if counts is None or mx is None or not len(counts):
            return out
        rows = np.zeros((bins * k, counts.shape[1]), counts.dtype)
        m = min(len(counts), bins * k)
        rows[:m] = counts[:m]
        folded = rows.reshape(bins, k, -1).sum(axis=1)
        out["p50"] = quantiles_rows(folded, 0.5, COARSE)
        out["p95"] = quantiles_rows(folded, 0.95, COARSE)
        peak = np.full(bins * k, np.nan)
        peak[:min(len(mx), bins * k)] = mx[:bins * k, 0]
        with np.errstate(all="ignore"):
            grouped = peak.reshape(bins, k)
            has = ~np.all(np.isnan(grouped), axis=1)
            out["max"][has] = np.nanmax(grouped[has], axis=1)
        return out

    def bus_series(self) -> dict:
        """Per-minute bus utilisation, frames and events by kind."""
        view = self.figures.bus_minutes
        n = self.minutes()
        data = np.zeros((n, view.shape[1]))
        data[: view.shape[0]] = view
        out = {"utilisation": (data[:, 0] / 60_000.0).tolist(), "frames": data[:, 1].astype(int).tolist(),
               "bytes": data[:, 2].astype(int).tolist()}
        for i, kind in enumerate(EVENT_KINDS):
            col = data[:, 3 + i]
            if col.any():
                out["event_" + kind] = col.astype(int).tolist()
        return out

    def worst_transactions(self, per_station: int | None = None) -> list[dict]:
        """Slowest answers of every station (slowest first), then each station's first failures (in time order)."""
        slow: list[dict] = []
        failed: list[dict] = []
        for st in sorted(set(self.figures.worst) | set(self.figures.failures)):
            slow.extend(self.slowest_rows(st)[:per_station])
            failed.extend(self.failure_rows(st)[:per_station])
        rows = sorted(slow, key=lambda r: -(r["response_ms"] or 0.0)) + sorted(failed, key=lambda r: r["t_s"])
        # new dicts: the figures' own rows stay as they are (they merge with other results)
        return [dict(r, utc=r.get("utc") or self.utc_at(r["t_s"]), label=self.station_map.label(r["station"]))
                for r in rows]

    def late_answers(self, address: int) -> list[dict]:
        return [dict(r, utc=r.get("utc") or self.utc_at(r["t_s"])) for r in self.figures.late_rows.get(address, [])]

    def response_histogram(self, address: int) -> tuple[list[float], list[int]]:
        """The station's response-time histogram merged to at most ~80 bars: (lower edges ms, counts)."""
        counts = self.figures.rt_mid[address]
        nz = np.flatnonzero(counts)
        if not len(nz):
            return [], []
        lo, hi = int(nz[0]), int(nz[-1]) + 1
        step = max(1, int(np.ceil((hi - lo) / 80)))
        edges, values = [], []
        for k in range(lo, hi, step):
            edges.append(round(float(FINE.lower_edge(k)), 3))
            values.append(int(counts[k:k + step].sum()))
        edges.append(round(float(FINE.lower_edge(min(hi, lo + step * len(values)))), 3))
        return edges, values


def silent_station(address: int, smap: StationMap) -> StationFigures:
    """Zero figures for a station of a capture in which nothing could be read."""
    info = smap.get(address)
    return StationFigures(
        address=address, name=smap.name(address), label=smap.label(address),
        position_m=info.position_m if info else None, notes=info.notes if info else "", requests=0, answered=0,
        ok=0, timeouts=0, late=0, exceptions=0, exceptions_by_code={}, corrupt=0, ambiguous=0, crc_errors=0,
        collisions=0, retries=0, response_ms=dict.fromkeys(("min", "p50", "p95", "p99", "max")),
        response_ms_interval=dict.fromkeys(("p50", "p95", "p99")), timing_halfwidth_ms=None,
        answers_over_timeout=None, poll_cycle_ms={"p50": None, "p95": None}, waiting_s=0.0, availability=None,
        events={}, functions={}, device_ids=[], late_listed=0)


def _station_figures(acc: Figures, address: int, smap: StationMap, timeout: TimeoutEstimate) -> StationFigures:
    o = acc.outcomes[address]
    requests = int(o.sum())
    answered = int(o[_O["ok"]] + o[_O["exception"]])
    codes = {int(c): int(n) for c, n in enumerate(acc.exception_codes[address]) if n}
    ev = acc.events[address + 1]
    info = smap.get(address)
    resp = response_figures(acc, address)
    poll = acc.poll[address]
    p50, p95 = quantile(poll, 0.5, FINE), quantile(poll, 0.95, FINE)
    return StationFigures(
        address=address, name=smap.name(address), label=smap.label(address),
        position_m=info.position_m if info else None, notes=info.notes if info else "",
        requests=requests, answered=answered, ok=int(o[_O["ok"]]), timeouts=int(o[_O["timeout"]]),
        late=int(o[_O["late"]]), exceptions=int(o[_O["exception"]]), exceptions_by_code=codes,
        corrupt=int(o[_O["corrupt"]]), ambiguous=int(o[_O["ambiguous"]]), crc_errors=int(ev[_K["crc_error"]] + ev[_K["truncated"]]), collisions=int(ev[_K["collision"]]),
        retries=int(acc.retries[address]), response_ms=resp["response_ms"],
        response_ms_interval=resp["response_ms_interval"], timing_halfwidth_ms=resp["timing_halfwidth_ms"],
        answers_over_timeout=None if timeout.timeout_ms is None else above(acc, address, timeout.timeout_ms),
        poll_cycle_ms={"p50": None if p50 is None else round(p50, 2), "p95": None if p95 is None else round(p95, 2)},
        waiting_s=round(float(acc.move_on_sum_ms[address]) / 1000.0, 3),
        availability=None if requests == 0 else round(answered / requests, 6),
        events={k: int(n) for k, n in zip(EVENT_KINDS, ev) if n},
        functions={int(f): int(n) for f, n in enumerate(acc.functions[address]) if n},
        device_ids=list(acc.device_ids.get(address, [])),
        late_listed=len(acc.late_rows.get(address, [])))


def _bus_figures(acc: Figures) -> BusFigures:
    series_ns = max(acc.t0_ns, acc.record_ns_of_minute(0))
    duration = 0.0 if acc.last_ns is None else max(
        0.0, (acc.last_ns - min(series_ns, acc.first_ns if acc.first_ns is not None else series_ns)) / 1e9)
    ev = acc.events.sum(axis=0)
    gaps = sorted(acc.largest_gaps, reverse=True)
    g50, g95 = quantile(acc.gaps, 0.5, FINE), quantile(acc.gaps, 0.95, FINE)
    return BusFigures(
        duration_s=round(duration, 3), frames=acc.frames, bytes=acc.frame_bytes, busy_s=round(acc.busy_ns / 1e9, 3),
        utilisation=None if duration <= 0 else round(min(1.0, acc.busy_ns / 1e9 / duration), 6),
        requests=int(acc.outcomes.sum()), broadcasts=int(acc.outcomes[:, _O["broadcast"]].sum()),
        events={k: int(n) for k, n in zip(EVENT_KINDS, ev) if n},
        unattributed_events={k: int(n) for k, n in zip(EVENT_KINDS, acc.events[0]) if n},
        functions={int(f): int(n) for f, n in enumerate(acc.functions.sum(axis=0)) if n},
        gap_ms={"p50": None if g50 is None else round(g50, 3), "p95": None if g95 is None else round(g95, 3),
                "max": round(gaps[0][0], 3) if gaps else None},
        largest_gaps=[{"t_s": round((t - acc.t0_ns) / 1e9, 3), "gap_ms": round(g, 3)} for g, t in gaps],
        unknown_outcomes=acc.unknown_outcomes, stray_addresses=acc.stray_addresses())


def build_result(header: CaptureHeader, paths: list, damage: ReadReport | None, figures: Figures,
                 station_map: StationMap, timeout: TimeoutEstimate, headers: list | None = None) -> AnalysisResult:
    """Judge unjudged figures against the timeout and read the per-station and bus figures out of them."""
    if figures.judged:
        raise ValueError("build_result takes the figures before they are judged")
    judged = figures.judged_copy(timeout.timeout_ms)
    addresses = sorted(set(judged.stations_seen()) | set(station_map.stations))
    stations = [_station_figures(judged, a, station_map, timeout) for a in addresses]
    return AnalysisResult(header=header, paths=[str(p) for p in paths], damage=damage, figures=judged,
                          station_map=station_map, timeout=timeout, stations=stations, bus=_bus_figures(judged),
                          analysed_utc=datetime.now(timezone.utc).isoformat(timespec="seconds"), unjudged=figures,
                          headers=list(headers or [header]))


def merge_results(results: list[AnalysisResult], timeout_ms: float | None = None,
                  station_map: StationMap | None = None) -> AnalysisResult:
    """One result from the results of several files, nights or ports: figures added, then judged once.

    The timeout is ``timeout_ms`` when given, else inferred again from the merged silences after
    unanswered requests (as ``analyze`` of all of them together would); findings are not evaluated
    here (``pipeline.evaluate_findings``).
    """
    from buswitness.analysis.timeout import given_timeout, infer_timeout
    if not results:
        raise ValueError("nothing to merge")
    if any(r.unjudged is None for r in results):
        raise ValueError("a result without its unjudged figures cannot be merged")
    figures = Figures.merge([r.unjudged for r in results])
    first = min(results, key=lambda r: (r.figures.utc0_ns or 0, r.figures.t0_ns))
    timeout = given_timeout(timeout_ms) if timeout_ms else infer_timeout(figures.move_on, figures.in_time)
    paths = [p for r in results for p in r.paths]
    damage = first.damage if len(results) == 1 else None
    headers = [h for r in results for h in r.headers]
    return build_result(first.header, paths, damage, figures, station_map or first.station_map, timeout, headers)


__all__ = [
    "EXCEPTION_NAMES",
    "FAILURES_PER_STATION",
    "AnalysisResult",
    "BusFigures",
    "StationFigures",
    "build_result",
    "merge_results",
]
