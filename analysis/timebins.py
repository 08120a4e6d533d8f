"""Time bins for the dashboard's charts, sized to the capture: seconds for a short one, hours for a week.

A chart of a 40 s capture drawn per minute is a single point, and a week drawn per minute is
10,080 points per station. So the dashboard picks a bin width that gives a readable number of
bins: from the per-minute series of the result (whole minutes, folded by 1, 2, 5 ... minutes)
or, for a capture shorter than ``DETAIL_MAX_S``, from the transactions, frames and events the
dashboard sink saw as they streamed past (``TimeDetail``), in bins of 1 to 30 s.

Response-time bands in both come from the same log-spaced histogram bins (``histogram.COARSE``)
as the per-minute series, so a bin's p50 and p95 are read the same way. The counts in the finer
bins are the decoder's outcomes before the analysis judges answers against the master's timeout
(docs/tables.md): a chart shape, never a figure the tables and findings quote.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from buswitness.analysis.histogram import COARSE, quantiles_rows
from buswitness.analysis.result import AnalysisResult
from buswitness.decode.events import EVENT_KINDS

#: Bins a chart should have at most (a week of 15-minute bins is 672).
MAX_BINS = 720
#: Captures up to this long (s) are drawn in bins under a minute, when the sink saw their transactions.
DETAIL_MAX_S = 1800.0
#: Bins under a minute aim at no more than this many bins (a 40 s capture: 40 bins of 1 s).
DETAIL_TARGET_BINS = 120
#: Rows the sink keeps for those bins before it gives up on them (memory stays small on any bus).
DETAIL_MAX_ROWS = 2_000_000
SUB_MINUTE_STEPS_S = (1, 2, 5, 10, 15, 30)
#: Polls of a typical station a bin under a minute holds at least.
POLLS_PER_BIN = 3
MINUTE_STEPS = (1, 2, 5, 10, 15, 30, 60, 120, 180, 360, 720, 1440)
#: Outcomes a chart counts as trouble (with the CRC errors and collisions on the station's address).
TROUBLE = ("timeout", "late", "corrupt")
_KIND = {k: i for i, k in enumerate(EVENT_KINDS)}


@dataclass
class TimeDetail:
    """What the dashboard sink keeps of a short capture: per transaction, frame and event, the time and little else."""

    t0_ns: int
    tx: list = field(default_factory=list)       # (t_s, station, outcome, response_ms) arrays per block
    frames: list = field(default_factory=list)   # (t_s, length) arrays per block
    events: list = field(default_factory=list)   # (t_s, kind, station) arrays per block
    rows: int = 0
    given_up: bool = False

    def add(self, frames: pd.DataFrame, transactions: pd.DataFrame, events: pd.DataFrame) -> None:
        """One block of decoder tables; past ``DETAIL_MAX_S`` or ``DETAIL_MAX_ROWS`` everything kept is dropped."""
        if self.given_up:
            return
        self.rows += len(frames) + len(transactions) + len(events)
        latest = max([0.0] + [float(t.max() - self.t0_ns) / 1e9 for t in
                              (frames["t_end_ns"].to_numpy(np.int64) if len(frames) else None,
                               transactions["t_request_end_ns"].to_numpy(np.int64) if len(transactions) else None)
                              if t is not None])
        if self.rows > DETAIL_MAX_ROWS or latest > DETAIL_MAX_S + 60:
            self.given_up = True
            self.tx, self.frames, self.events = [], [], []
            return
        if len(transactions):
            self.tx.append(((transactions["t_request_end_ns"].to_numpy(np.int64) - self.t0_ns) / 1e9,
                            transactions["station"].to_numpy(np.int64),
                            transactions["outcome"].astype(str).to_numpy(),
                            transactions["response_ms"].to_numpy(np.float64)))
        if len(frames):
            self.frames.append(((frames["t_start_ns"].to_numpy(np.int64) - self.t0_ns) / 1e9,
                                frames["length"].to_numpy(np.int64)))
        if len(events):
            self.events.append(((events["t_ns"].to_numpy(np.int64) - self.t0_ns) / 1e9,
                                events["kind"].astype(str).to_numpy(), events["station"].to_numpy(np.int64)))

    @property
    def usable(self) -> bool:
        return not self.given_up


@dataclass
class Bins:
    """Every time series a chart draws, in one set of bins."""

    x: list                  #: bin starts: UTC text, or seconds / hours since the capture start
    x_title: str
    width_s: float
    per: str                 #: "per 5 s", "per minute", "per 15 min"
    stations: dict           #: address -> {"requests", "in_time", "trouble": [int], "p50", "p95", "max": [float|None]}
    utilisation: list        #: share of each bin the line carried bytes (0..1)
    events: dict             #: kind -> [int]


def per_text(width_s: float) -> str:
    if width_s < 60:
        return f"per {width_s:g} s"
    if width_s == 60:
        return "per minute"
    if width_s < 3600:
        return f"per {width_s / 60:g} min"
    return "per hour" if width_s == 3600 else f"per {width_s / 3600:g} h"


def _nan_to_none(a: np.ndarray) -> list:
    return [None if not math.isfinite(v) else round(float(v), 3) for v in a]


def bins_for(result: AnalysisResult, detail: TimeDetail | None = None) -> Bins:
    """The series of every chart, in bins that suit the capture's length."""
    duration = max(0.0, result.span_s[1] - min(0.0, result.span_s[0]))
    if detail is not None and detail.usable and duration <= DETAIL_MAX_S and (detail.tx or detail.frames):
        # a bin holds a few polls of each station, so its availability and percentiles mean something
        cycles = [s.poll_cycle_ms.get("p50") for s in result.stations if s.requests]
        cycle_s = sorted(c for c in cycles if c)[len([c for c in cycles if c]) // 2] / 1000 if any(cycles) else 0.0
        width = next((w for w in SUB_MINUTE_STEPS_S
                      if duration / w <= DETAIL_TARGET_BINS and w >= POLLS_PER_BIN * cycle_s), None)
        if width is not None:
            return _detail_bins(result, detail, float(width), duration)
    minutes = result.minutes()
    k = next((k for k in MINUTE_STEPS if minutes / k <= MAX_BINS), MINUTE_STEPS[-1])
    return _minute_bins(result, k)


def _fold(a: np.ndarray, k: int, how: str = "sum") -> np.ndarray:
    """Rows of ``a`` grouped k at a time (the last group padded)."""
    n = len(a)
    nb = max(1, math.ceil(n / k))
    pad = nb * k - n
    fill = np.nan if how == "max" else 0
    a = np.concatenate([a, np.full((pad,) + a.shape[1:], fill, dtype=float if how == "max" else a.dtype)])
    a = a.reshape((nb, k) + a.shape[1:])
    if how == "max":
        with np.errstate(all="ignore"):
            out = np.full(a.shape[:1] + a.shape[2:], np.nan)
            has = ~np.all(np.isnan(a), axis=1)
            out[has] = np.nanmax(a[has], axis=1)
            return out
    return a.sum(axis=1)


def _minute_bins(result: AnalysisResult, k: int) -> Bins:
    n = result.minutes()
    nb = max(1, math.ceil(n / k)) if n else 0
    anchored = bool(result.utc_at(0.0))
    starts = [result.minute_start_s(i * k) for i in range(nb)]
    if anchored:
        x = [result.utc_at(s)[:19] for s in starts]
        title = "time (UTC)"
    else:
        x = [round(s / 3600.0, 4) for s in starts]
        title = "hours since capture start"
    stations = {}
    for s in result.stations:
        series = result.station_series(s.address)
        counts = np.array([series[c] for c in ("requests", "ok", "exception", "timeout", "late", "corrupt",
                                               "crc_errors", "collisions")], dtype=np.int64).T.reshape(n, 8)
        folded = _fold(counts, k)[:nb] if n else np.zeros((0, 8), np.int64)
        bands = result.response_bands(s.address, k, nb)
        stations[s.address] = {"requests": folded[:, 0].tolist(), "in_time": (folded[:, 1] + folded[:, 2]).tolist(),
                               "trouble": folded[:, 3:].sum(axis=1).tolist(),
                               "p50": _nan_to_none(bands["p50"]), "p95": _nan_to_none(bands["p95"]),
                               "max": _nan_to_none(bands["max"])}
    bus = result.bus_series()
    util = _fold(np.asarray(bus["utilisation"], float), k)[:nb] / k if n else np.zeros(0)
    events = {kind[6:]: _fold(np.asarray(v, np.int64), k)[:nb].tolist() for kind, v in bus.items()
              if kind.startswith("event_")}
    return Bins(x=x, x_title=title, width_s=60.0 * k, per=per_text(60.0 * k), stations=stations,
                utilisation=[round(u, 5) for u in util.tolist()], events=events)


def _detail_bins(result: AnalysisResult, d: TimeDetail, width: float, duration: float) -> Bins:
    start = min(0.0, result.span_s[0])
    nb = max(1, math.ceil((max(result.span_s[1], start) - start) / width + 1e-9))

    def index(t: np.ndarray) -> np.ndarray:
        return np.clip(((t - start) // width).astype(np.int64), 0, nb - 1)

    anchored = bool(result.utc_at(0.0))
    starts = [start + i * width for i in range(nb)]
    if anchored:
        x = [result.utc_at(s)[:23] for s in starts]
        title = "time (UTC)"
    else:
        x = [round(s, 3) for s in starts]
        title = "seconds since capture start"

    def cat(parts: list, i: int) -> np.ndarray:
        return np.concatenate([p[i] for p in parts]) if parts else np.zeros(0)

    t, st, out, rt = (cat(d.tx, i) for i in range(4))
    et, ek, es = (cat(d.events, i) for i in range(3))
    ft, fl = (cat(d.frames, i) for i in range(2))
    b = index(t) if len(t) else np.zeros(0, np.int64)
    eb = index(et) if len(et) else np.zeros(0, np.int64)
    stations = {}
    for s in result.stations:
        sel = st == s.address
        bi = b[sel]
        o = out[sel]
        r = rt[sel]
        requests = np.bincount(bi, minlength=nb)
        in_time = np.bincount(bi[np.isin(o, ("ok", "exception"))], minlength=nb)
        trouble = np.bincount(bi[np.isin(o, TROUBLE)], minlength=nb)
        esel = (es == s.address) & np.isin(ek, ("crc_error", "truncated", "collision"))
        trouble = trouble + np.bincount(eb[esel], minlength=nb)
        timed = np.isfinite(r) & np.isin(o, ("ok", "exception", "late"))
        hist = np.bincount(bi[timed] * COARSE.count + COARSE.index(r[timed]),
                           minlength=nb * COARSE.count).reshape(nb, COARSE.count)
        mx = np.full(nb, np.nan)
        if timed.any():
            np.fmax.at(mx, bi[timed], r[timed])
        stations[s.address] = {"requests": requests.tolist(), "in_time": in_time.tolist(),
                               "trouble": trouble.tolist(),
                               "p50": _nan_to_none(quantiles_rows(hist, 0.5, COARSE)),
                               "p95": _nan_to_none(quantiles_rows(hist, 0.95, COARSE)), "max": _nan_to_none(mx)}
    char_s = result.header.serial.char_time_s
    busy = np.bincount(index(ft), weights=fl * char_s, minlength=nb) if len(ft) else np.zeros(nb)
    events = {}
    for kind in EVENT_KINDS:
        sel = ek == kind
        if sel.any():
            events[kind] = np.bincount(eb[sel], minlength=nb).tolist()
    return Bins(x=x, x_title=title, width_s=width, per=per_text(width), stations=stations,
                utilisation=[round(min(1.0, v / width), 5) for v in busy.tolist()], events=events)
