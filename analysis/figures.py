"""Per-station and bus accumulators: fed table blocks from the decoder, merged, then finalised.

Streaming by design: every block of frames, transactions and events updates fixed-size
arrays (counts are exact; response-time quantiles come from log-spaced histograms of the
midpoints *and* of both ends of each interval, so a quantile is reported with the interval
the timestamps allow). Memory grows only with the number of minutes (the time series) and is
capped for the example lists (worst transactions, late answers: the counts stay exact).
"""

from __future__ import annotations

import dataclasses
import heapq
import math
from dataclasses import dataclass, field
from functools import reduce

import numpy as np
import pandas as pd
from buswitness.analysis.devid import device_id_text
from buswitness.analysis.histogram import COARSE, FINE, LogBins, count_above, quantile, quantiles_rows
from buswitness.decode.events import EVENT_KINDS as DECODER_EVENT_KINDS
from buswitness.decode.events import OUTCOMES
from buswitness.decode.pairing import address_groups
from buswitness.decode.rawbytes import take as take_raws
from buswitness.decode.tables import Columns

#: The decoder's vocabulary (docs/tables.md), plus "other" for a kind this build does not know.
EVENT_KINDS = DECODER_EVENT_KINDS + ("other",)
#: Columns of the per-station per-minute series.
MINUTE_COLUMNS = ("requests", "ok", "exception", "timeout", "late", "corrupt", "retries", "crc_errors",
                  "collisions")
#: Columns of the bus per-minute series (besides the event kinds).
BUS_MINUTE_COLUMNS = ("busy_ms", "frames", "bytes")

N_ADDR = 256
NS_PER_MIN = 60_000_000_000
WORST_PER_STATION = 25      #: slowest answers kept per station for the frame browser
FAILURES_PER_STATION = 25   #: first timeouts/corrupt answers kept per station as examples
LATE_CAP = 5000             #: late answers listed per station (the count is exact beyond it)
#: Slowest in-time answers kept per station until the timeout is known: those over it are late.
#: The counts stay exact while a station gives fewer answers over the timeout than this.
SLOW_KEEP = 2000
LATE_TOTAL_CAP = 50_000     #: late answers listed over all stations (keeps memory bounded on any bus)
LARGEST_GAPS = 20           #: longest silences between frames kept
DEVICE_IDS_PER_STATION = 4  #: distinct identification strings kept per station
MIN_POLLS = 3               #: requests to a silent address before it is listed as a station

_OUTCOME_INDEX = {name: i for i, name in enumerate(OUTCOMES)}
_KIND_INDEX = {name: i for i, name in enumerate(EVENT_KINDS)}
_DAMAGE_KINDS = ("crc_error", "truncated", "stray_bytes", "collision", "line_error")


def _codes(values: pd.Series | np.ndarray, vocabulary: tuple[str, ...], fallback: int) -> np.ndarray:
    """Index of each value in ``vocabulary`` (``fallback`` for anything else), fast for categoricals.

    Codes already (a :class:`Columns` table's category column, in a vocabulary that ``vocabulary``
    begins with) are taken as they are, -1 (a kind the decoder does not know) as ``fallback``.
    """
    if isinstance(values, np.ndarray) and values.dtype.kind in "iu":
        codes = values.astype(np.int64)
        return np.where(codes < 0, fallback, codes)
    index = {name: i for i, name in enumerate(vocabulary)}
    if isinstance(values.dtype, pd.CategoricalDtype):
        lookup = np.array([index.get(str(c), fallback) for c in values.cat.categories] + [fallback], np.int64)
        return lookup[values.cat.codes.to_numpy(np.int64)]  # code -1 (missing) takes the last entry
    uniques, inverse = np.unique(values.to_numpy(dtype=object).astype(str), return_inverse=True)
    lookup = np.array([index.get(u, fallback) for u in uniques.tolist()], np.int64)
    return lookup[inverse.reshape(-1)]


def _take(column, index: np.ndarray) -> list:
    """One column's values at ``index`` as a list (a bytes column's entries made into ``bytes`` only here)."""
    if isinstance(column, pd.Series):
        column = column.to_numpy(dtype=object)
    return take_raws(column, index)


def _present(station: np.ndarray) -> np.ndarray:
    """The distinct stations (addresses below N_ADDR), ascending: ``np.unique`` by counting, not sorting."""
    return np.flatnonzero(np.bincount(station, minlength=N_ADDR))


#: The distinct stations and each entry's place among them (``np.unique(..., return_inverse=True)``).
_groups = address_groups


def _add_hist(target: np.ndarray, station: np.ndarray, values_ms: np.ndarray | None,
              groups: tuple[np.ndarray, np.ndarray] | None = None, bins: np.ndarray | None = None) -> None:
    """Count ``values_ms`` into the rows ``station`` of a (station, FINE bin) histogram
    (``groups``: :func:`_groups` of ``station``, when the caller has it; ``bins``: their FINE bins, likewise)."""
    stations, compact = groups if groups is not None else _groups(station)
    counts = np.bincount(compact * FINE.count + (FINE.index(values_ms) if bins is None else bins),
                         minlength=len(stations) * FINE.count).reshape(len(stations), FINE.count)
    target[stations] += counts


def _stable_order(keys: np.ndarray) -> np.ndarray:
    """The order that sorts ``keys`` (stations or their places among them, below 256) keeping rows of
    one key in their order: a stable sort on one byte, which numpy does by radix."""
    return np.argsort(keys.astype(np.uint8), kind="stable")


def _minute_sum(minute: np.ndarray, n_min: int, weights: np.ndarray | None = None) -> np.ndarray:
    return np.bincount(minute, weights=weights, minlength=n_min)[:n_min]


class _Growing:
    """A 2-D array indexed by minute that grows as later minutes arrive."""

    def __init__(self, width: int, dtype: type = np.int64, fill: float = 0) -> None:
        self.fill = fill
        self.data: np.ndarray = np.full((64, width), fill, dtype=dtype)
        self.minutes = 0

    def ensure(self, n_minutes: int) -> np.ndarray:
        if n_minutes > self.data.shape[0]:
            rows = max(n_minutes, 2 * self.data.shape[0])
            grown = np.full((rows, self.data.shape[1]), self.fill, dtype=self.data.dtype)
            grown[: self.data.shape[0]] = self.data
            self.data = grown
        self.minutes = max(self.minutes, n_minutes)
        return self.data

    def view(self) -> np.ndarray:
        return self.data[: self.minutes]

    def merge(self, other: _Growing, how: str = "add") -> None:
        data = self.ensure(other.minutes)
        if how == "max":
            np.fmax(data[: other.minutes], other.view(), out=data[: other.minutes])
        else:
            data[: other.minutes] += other.view()


def tx_row(t0_ns: int, t_req_ns: int, station: int, function: int, outcome: str, response_ms: float,
           lo: float, hi: float, exception_code: int, retry: bool, request: bytes, response: bytes) -> dict:
    """One transaction as the plain dict every report lists."""
    return {"t_s": (t_req_ns - t0_ns) / 1e9, "station": int(station), "function": int(function),
            "outcome": str(outcome), "response_ms": None if math.isnan(response_ms) else float(response_ms),
            "response_ms_low": None if math.isnan(lo) else float(lo),
            "response_ms_high": None if math.isnan(hi) else float(hi),
            "exception_code": int(exception_code), "retry": bool(retry),
            "request_hex": bytes(request).hex(" "), "response_hex": bytes(response).hex(" ")}


class _Pending:
    """An example heap's row: its index in the block being added (-1 once pushed out), then
    its values (``row``) once the block's heaps are settled."""

    __slots__ = ("index", "row")

    def __init__(self, index: int) -> None:
        self.index = index
        self.row: tuple | None = None


@dataclass
class Accumulator:
    """Everything the analysis keeps while the capture streams past; ``merge`` adds two together."""

    t0_ns: int  #: the capture start the file states, on the record clock: every reported time counts from it
    char_ns: float
    minute0: int = 0  #: absolute minute (see ``Figures.minute0``) of the per-minute series' first row
    utc0_ns: int | None = None  #: UTC (ns since 1970) at t0_ns, when the capture states its wall clock
    capture_id: str = ""
    outcomes: np.ndarray = field(default_factory=lambda: np.zeros((N_ADDR, len(OUTCOMES)), np.int64))
    retries: np.ndarray = field(default_factory=lambda: np.zeros(N_ADDR, np.int64))
    exception_codes: np.ndarray = field(default_factory=lambda: np.zeros((N_ADDR, 256), np.int64))
    functions: np.ndarray = field(default_factory=lambda: np.zeros((N_ADDR, 256), np.int64))
    rt_mid: np.ndarray = field(default_factory=lambda: np.zeros((N_ADDR, FINE.count), np.int64))
    rt_low: np.ndarray = field(default_factory=lambda: np.zeros((N_ADDR, FINE.count), np.int64))
    rt_high: np.ndarray = field(default_factory=lambda: np.zeros((N_ADDR, FINE.count), np.int64))
    halfwidth: np.ndarray = field(default_factory=lambda: np.zeros((N_ADDR, FINE.count), np.int64))
    rt_min: np.ndarray = field(default_factory=lambda: np.full(N_ADDR, np.inf))
    rt_max: np.ndarray = field(default_factory=lambda: np.full(N_ADDR, -np.inf))
    ok_max: np.ndarray = field(default_factory=lambda: np.full(N_ADDR, -np.inf))  #: slowest answer taken in time
    in_time: np.ndarray = field(default_factory=lambda: np.zeros(FINE.count, np.int64))  #: bus-wide, ok + exception
    poll: np.ndarray = field(default_factory=lambda: np.zeros((N_ADDR, FINE.count), np.int64))
    last_request_ns: np.ndarray = field(default_factory=lambda: np.full(N_ADDR, -1, np.int64))
    first_request_ns: np.ndarray = field(default_factory=lambda: np.full(N_ADDR, -1, np.int64))
    move_on: np.ndarray = field(default_factory=lambda: np.zeros((N_ADDR, FINE.count), np.int64))
    move_on_sum_ms: np.ndarray = field(default_factory=lambda: np.zeros(N_ADDR))
    events: np.ndarray = field(default_factory=lambda: np.zeros((N_ADDR + 1, len(EVENT_KINDS)), np.int64))
    gaps: np.ndarray = field(default_factory=lambda: np.zeros(FINE.count, np.int64))
    frames: int = 0
    frame_bytes: int = 0
    busy_ns: float = 0.0
    first_ns: int | None = None
    last_ns: int | None = None
    unknown_outcomes: int = 0
    largest_gaps: list = field(default_factory=list)     # heap of (gap_ms, t_ns)
    worst: dict = field(default_factory=dict)            # station -> heap of (response_ms, t_ns, seq, _Pending)
    failures: dict = field(default_factory=dict)         # station -> list of rows
    late_rows: dict = field(default_factory=dict)        # station -> list of rows
    slow: dict = field(default_factory=dict)             # station -> heap of (response_ms, t_ns, seq, _Pending): in time
    slow_dropped: np.ndarray = field(default_factory=lambda: np.full(N_ADDR, -np.inf))  #: slowest one dropped
    judged_ms: float | None = None  #: the timeout the in-time answers were judged against (judge())
    device_ids: dict = field(default_factory=dict)       # station -> list of str
    station_minutes: dict = field(default_factory=dict)  # station -> _Growing(len(MINUTE_COLUMNS))
    station_minute_rt: dict = field(default_factory=dict)   # station -> _Growing(COARSE.count, np.int32)
    station_minute_max: dict = field(default_factory=dict)  # station -> _Growing(1, float, nan)
    bus_minutes: _Growing = field(default_factory=lambda: _Growing(len(BUS_MINUTE_COLUMNS) + len(EVENT_KINDS),
                                                                    np.float64))
    _last_frame_end_ns: int | None = None
    _first_frame_start_ns: int | None = None
    _lead_request_ns: int | None = None  # start of the first request: ends a silence left open before it
    _pending_timeout: tuple | None = None  # (station, t_request_end_ns) awaiting the next request
    _prev_tx: tuple = (-1, -1)  # (station, t_response_start_ns) of the last transaction seen
    _seq: int = 0

    # -- feeding ---------------------------------------------------------------------------------

    def _minute(self, t_ns: np.ndarray) -> np.ndarray:
        anchor = self.utc0_ns or 0
        return np.maximum((np.asarray(t_ns, np.int64) - self.t0_ns + anchor) // NS_PER_MIN - self.minute0, 0)

    def _span(self, t_ns: np.ndarray) -> None:
        if len(t_ns):
            lo, hi = int(t_ns.min()), int(t_ns.max())
            self.first_ns = lo if self.first_ns is None else min(self.first_ns, lo)
            self.last_ns = hi if self.last_ns is None else max(self.last_ns, hi)

    def add_frames(self, frames: pd.DataFrame) -> None:
        """Bus traffic: frames, bytes, line busy time, silences between frames."""
        if frames.empty:
            return
        t_start = np.asarray(frames["t_start_ns"], np.int64)
        t_end = np.asarray(frames["t_end_ns"], np.int64)
        length = np.asarray(frames["length"], np.int64)
        self._span(t_start)
        self._span(t_end)
        self.frames += len(frames)
        self.frame_bytes += int(length.sum())
        busy = length * self.char_ns
        self.busy_ns += float(busy.sum())
        minute = self._minute(t_start)
        m0, n_min = int(minute.min()), int(minute.max()) + 1
        data = self.bus_minutes.ensure(n_min)
        rel = minute - m0
        data[m0:n_min, 0] += _minute_sum(rel, n_min - m0, busy / 1e6)
        data[m0:n_min, 1] += _minute_sum(rel, n_min - m0)
        data[m0:n_min, 2] += _minute_sum(rel, n_min - m0, length.astype(np.float64))
        order = np.argsort(t_start, kind="stable")
        starts, ends = t_start[order], t_end[order]
        prev_end = np.concatenate(([self._last_frame_end_ns if self._last_frame_end_ns is not None else starts[0]],
                                   ends[:-1]))
        gap_ms = (starts - prev_end) / 1e6
        if self._last_frame_end_ns is None:
            self._first_frame_start_ns = int(starts[0])
            gap_ms, starts_g = gap_ms[1:], starts[1:]
        else:
            starts_g = starts
        gap_ms = np.maximum(gap_ms, 0.0)
        self._last_frame_end_ns = int(max(ends.max(), self._last_frame_end_ns or ends.max()))
        if len(gap_ms):
            self.gaps += np.bincount(FINE.index(gap_ms), minlength=FINE.count)
            # the longest LARGEST_GAPS by (gap, start), sorted among the candidates only: once the
            # list is full, a gap shorter than its shortest cannot enter
            cand = np.arange(len(gap_ms))
            if len(self.largest_gaps) >= LARGEST_GAPS:
                cand = np.flatnonzero(gap_ms >= self.largest_gaps[0][0])
            if len(cand) > 4 * LARGEST_GAPS:
                g = gap_ms[cand]
                cand = cand[g >= np.partition(g, -LARGEST_GAPS)[-LARGEST_GAPS]]
            top = cand[np.lexsort((starts_g[cand], gap_ms[cand]))[-LARGEST_GAPS:]]
            for i in top:
                item = (float(gap_ms[i]), int(starts_g[i]))
                if len(self.largest_gaps) < LARGEST_GAPS:
                    heapq.heappush(self.largest_gaps, item)
                elif item > self.largest_gaps[0]:
                    heapq.heapreplace(self.largest_gaps, item)

    def add_transactions(self, tx: pd.DataFrame) -> None:
        """Outcomes, response times, poll cycle, master move-on gaps, example lists."""
        if tx.empty:
            return
        t_req = np.asarray(tx["t_request_end_ns"], np.int64)
        if t_req.size > 1 and (np.diff(t_req) < 0).any():
            order = np.argsort(t_req, kind="stable")
            tx = tx.take(order) if isinstance(tx, Columns) else tx.iloc[order]
            t_req = np.asarray(tx["t_request_end_ns"], np.int64)
        self._span(t_req)
        station = np.asarray(tx["station"], np.int64)
        function = np.asarray(tx["function"], np.int64)
        outcome = _codes(tx["outcome"], OUTCOMES, -1)
        self.unknown_outcomes += int((outcome < 0).sum())
        known = outcome >= 0
        self.outcomes += np.bincount(station[known] * len(OUTCOMES) + outcome[known],
                                     minlength=N_ADDR * len(OUTCOMES)).reshape(N_ADDR, len(OUTCOMES))
        retry = np.asarray(tx["retry"], bool)
        self.retries += np.bincount(station[retry], minlength=N_ADDR)
        exc = outcome == _OUTCOME_INDEX["exception"]
        if exc.any():
            codes = np.asarray(tx["exception_code"], np.int64)[exc]
            self.exception_codes += np.bincount(station[exc] * 256 + codes, minlength=N_ADDR * 256).reshape(N_ADDR, 256)
        self.functions += np.bincount(station * 256 + function, minlength=N_ADDR * 256).reshape(N_ADDR, 256)

        rt = np.asarray(tx["response_ms"], np.float64)
        lo = np.asarray(tx["response_ms_low"], np.float64)
        hi = np.asarray(tx["response_ms_high"], np.float64)
        timed = np.isfinite(rt) & np.isin(outcome, [_OUTCOME_INDEX[o] for o in ("ok", "exception", "late")])
        if timed.any():
            s = station[timed]
            groups = _groups(s)
            mid_bins = FINE.index(rt[timed])
            _add_hist(self.rt_mid, s, None, groups, mid_bins)
            for hist, values in ((self.rt_low, np.where(np.isfinite(lo), lo, rt)),
                                 (self.rt_high, np.where(np.isfinite(hi), hi, rt))):
                _add_hist(hist, s, values[timed], groups)
            _add_hist(self.halfwidth, s, np.where(np.isfinite(hi) & np.isfinite(lo), (hi - lo) / 2, 0.0)[timed],
                      groups)
            np.fmin.at(self.rt_min, s, rt[timed])
            np.fmax.at(self.rt_max, s, rt[timed])
            in_time = timed & np.isin(outcome, [_OUTCOME_INDEX["ok"], _OUTCOME_INDEX["exception"]])
            np.fmax.at(self.ok_max, station[in_time], rt[in_time])
            self.in_time += np.bincount(mid_bins[in_time[timed]], minlength=FINE.count)

        self._poll_cycle(station, t_req)
        self._move_on(tx, station, outcome, t_req)
        self._station_minutes(station, outcome, retry, rt, timed, t_req)
        self._examples(tx, station, outcome, rt, timed, t_req)

    def _poll_cycle(self, station: np.ndarray, t_req: np.ndarray) -> None:
        # by station, then time: t_req is in time order (add_transactions sorts it), so a stable sort
        # by station alone gives lexsort((t_req, station))'s order
        order = _stable_order(station)
        s, t = station[order], t_req[order]
        same = np.concatenate(([False], s[1:] == s[:-1]))
        prev = np.where(same, np.concatenate(([0], t[:-1])), self.last_request_ns[s])
        valid = prev >= 0
        valid &= s != 0
        if valid.any():
            d_ms = (t[valid] - prev[valid]) / 1e6
            _add_hist(self.poll, s[valid], np.maximum(d_ms, 0))
        last = np.concatenate((s[1:] != s[:-1], [True]))
        self.last_request_ns[s[last]] = t[last]
        first = ~same
        unset = self.first_request_ns[s[first]] < 0
        self.first_request_ns[s[first][unset]] = t[first][unset]

    def _move_on(self, tx: pd.DataFrame, station: np.ndarray, outcome: np.ndarray, t_req: np.ndarray) -> None:
        """Silence after an unanswered request until the master's next request: its timeout at work.

        Not where the station's late answer to its previous request came during that silence (a
        retry, and the answer to the first attempt after it): the master may have taken that
        answer and moved on early, so the silence says nothing about its timeout.
        """
        resp = np.asarray(tx["t_response_start_ns"], np.int64)
        prev_station = np.concatenate(([self._prev_tx[0]], station[:-1]))
        prev_resp = np.concatenate(([self._prev_tx[1]], resp[:-1]))
        self._prev_tx = (int(station[-1]), int(resp[-1]))
        timeout = (outcome == _OUTCOME_INDEX["timeout"]) & ~((prev_station == station) & (prev_resp > t_req))
        first_block = self._lead_request_ns is None
        if self._pending_timeout is None and not timeout.any() and not first_block:
            return
        need = np.zeros(len(tx), bool)
        need[0] = True
        need[1:] = timeout[:-1]
        req_len = np.zeros(len(tx), np.int64)
        req_len[need] = [len(r) for r in _take(tx["request_raw"], np.flatnonzero(need))]
        next_start = t_req - (req_len * self.char_ns).astype(np.int64)
        if first_block:
            self._lead_request_ns = int(next_start[0])
        if self._pending_timeout is not None:
            st, t_end = self._pending_timeout
            self._add_move_on(np.array([st]), np.array([(next_start[0] - t_end) / 1e6]))
            self._pending_timeout = None
        idx = np.flatnonzero(timeout[:-1])
        if len(idx):
            self._add_move_on(station[idx], (next_start[idx + 1] - t_req[idx]) / 1e6)
        if timeout[-1]:
            self._pending_timeout = (int(station[-1]), int(t_req[-1]))

    def _add_move_on(self, station: np.ndarray, gap_ms: np.ndarray) -> None:
        gap_ms = np.maximum(gap_ms, 0.0)
        _add_hist(self.move_on, station, gap_ms)
        np.add.at(self.move_on_sum_ms, station, gap_ms)

    def _station_minutes(self, station: np.ndarray, outcome: np.ndarray, retry: np.ndarray, rt: np.ndarray,
                         timed: np.ndarray, t_req: np.ndarray) -> None:
        minute = self._minute(t_req)
        m0 = int(minute.min())
        n_min = int(minute.max()) + 1
        rel = minute - m0
        n_rel = n_min - m0
        stations, compact = _groups(station)
        # one bincount over (station, minute, column) for every count column at once
        n_col = len(MINUTE_COLUMNS)
        col_of_outcome = np.full(len(OUTCOMES) + 1, -1, np.int64)
        for col, name in enumerate(("ok", "exception", "timeout", "late", "corrupt"), start=1):
            col_of_outcome[_OUTCOME_INDEX[name]] = col
        size = len(stations) * n_rel * n_col
        key = (compact * n_rel + rel) * n_col
        oc = col_of_outcome[outcome]
        counts = (np.bincount(key, minlength=size) + np.bincount(key[oc >= 0] + oc[oc >= 0], minlength=size)
                  + np.bincount(key[retry] + 6, minlength=size)).reshape(len(stations), n_rel, n_col)
        # the timed answers by station (a stable sort: each station's rows stay in minute order),
        # so a station's rows are one slice, and its slowest per minute the largest of each run
        t_compact = compact[timed]
        t_order = _stable_order(t_compact)
        t_station, t_rel, t_rt = t_compact[t_order], rel[timed][t_order], rt[timed][t_order]
        t_bin = COARSE.index(t_rt)
        bounds = np.searchsorted(t_station, np.arange(len(stations) + 1))
        for j, st in enumerate(stations.tolist()):
            data = self.station_minutes.setdefault(st, _Growing(n_col)).ensure(n_min)
            data[m0:n_min] += counts[j]
            a, b = int(bounds[j]), int(bounds[j + 1])
            if a == b:
                continue
            hist = self.station_minute_rt.setdefault(st, _Growing(COARSE.count, np.int32)).ensure(n_min)
            hist[m0:n_min] += np.bincount(t_rel[a:b] * COARSE.count + t_bin[a:b],
                                          minlength=n_rel * COARSE.count).reshape(n_rel, COARSE.count)
            runs = np.flatnonzero(np.r_[True, t_rel[a + 1:b] != t_rel[a:b - 1]]) + a
            mx = self.station_minute_max.setdefault(st, _Growing(1, np.float64, np.nan)).ensure(n_min)
            at = m0 + t_rel[runs]
            mx[at, 0] = np.fmax(mx[at, 0], np.fmax.reduceat(t_rt[a:b], runs - a))

    def _examples(self, tx: pd.DataFrame, station: np.ndarray, outcome: np.ndarray, rt: np.ndarray,
                  timed: np.ndarray, t_req: np.ndarray) -> None:
        cols = ("t_request_end_ns", "station", "function", "outcome", "response_ms", "response_ms_low",
                "response_ms_high", "exception_code", "retry", "request_raw", "response_raw")

        def values_of(index: list[int]) -> list[tuple]:
            """The listed rows of this block as tuples of their values (only the rows an example keeps)."""
            if not index:
                return []
            take = np.asarray(index, np.int64)
            values = [_take(tx[c], take) for c in cols]
            if isinstance(tx, Columns):  # outcomes as codes: their names, as a table gives them
                o = cols.index("outcome")
                values[o] = [OUTCOMES[k] if 0 <= k < len(OUTCOMES) else "unknown" for k in values[o]]
            return list(zip(*values))

        def rows_of(index: list[int]) -> list[dict]:
            """The listed rows of this block as plain dicts."""
            return [tx_row(self.t0_ns, *vals) for vals in values_of(index)]

        # the heaps hold (value, request time, order, _Pending), ranked by value, then time: the
        # same rows are kept however the transactions are cut into blocks (segments, steps), as
        # Figures.merge ranks them. A row of this block enters as its index, gets a tuple of its
        # values if it is still held at the end of the block (most are pushed out again), and
        # becomes a dict in figures() if it is held to the end.
        born: list[_Pending] = []

        def above(heap: list, keep: int, rows: np.ndarray) -> np.ndarray:
            """Of ``rows``, those that rank above the heap's least (all of them while it has room)."""
            if len(heap) < keep:
                return rows
            f_rt, f_t = heap[0][0], heap[0][1]
            return rows & ((rt > f_rt) | ((rt == f_rt) & (t_req > f_t)))

        for st in _present(station[timed]):
            heap = self.worst.setdefault(int(st), [])
            idx = np.flatnonzero(above(heap, WORST_PER_STATION, timed & (station == st)))
            top = idx[np.lexsort((t_req[idx], rt[idx]))[-WORST_PER_STATION:]]
            for i in top.tolist():
                self._seq += 1
                item = (float(rt[i]), int(t_req[i]), self._seq, _Pending(i))
                if len(heap) < WORST_PER_STATION:
                    heapq.heappush(heap, item)
                elif item > heap[0]:
                    heapq.heapreplace(heap, item)[3].index = -1
                else:
                    continue
                born.append(item[3])
        in_time = timed & np.isin(outcome, [_OUTCOME_INDEX["ok"], _OUTCOME_INDEX["exception"]])
        for st in _present(station[in_time]):
            heap = self.slow.setdefault(int(st), [])
            mine = in_time & (station == st)
            candidates = above(heap, SLOW_KEEP, mine)
            out = mine & ~candidates  # at or below the full list's least: left out at once, and noted as
            if out.any():             # left out (judge() counts beyond the list by the slowest left out)
                self.slow_dropped[st] = max(self.slow_dropped[st], float(np.max(rt, where=out, initial=-np.inf)))
            idx = np.flatnonzero(candidates)
            if len(idx) > SLOW_KEEP:
                ranked = idx[np.lexsort((t_req[idx], rt[idx]))]
                self.slow_dropped[st] = max(self.slow_dropped[st], float(rt[ranked[:-SLOW_KEEP]].max()))
                idx = np.sort(ranked[-SLOW_KEEP:])
            for i in idx.tolist():
                self._seq += 1
                item = (float(rt[i]), int(t_req[i]), self._seq, _Pending(i))
                born.append(item[3])
                if len(heap) < SLOW_KEEP:
                    heapq.heappush(heap, item)
                else:
                    gone = heapq.heappushpop(heap, item)
                    gone[3].index = -1
                    self.slow_dropped[st] = max(self.slow_dropped[st], gone[0])
        held = [p for p in born if p.index >= 0 and p.row is None]
        for p, row in zip(held, values_of([p.index for p in held])):
            p.row = row
        failed = np.isin(outcome, [_OUTCOME_INDEX["timeout"], _OUTCOME_INDEX["corrupt"]])
        for st in _present(station[failed]):
            kept = self.failures.setdefault(int(st), [])
            room = FAILURES_PER_STATION - len(kept)
            if room > 0:
                kept.extend(rows_of(np.flatnonzero(failed & (station == st))[:room].tolist()))
        late = outcome == _OUTCOME_INDEX["late"]
        for st in _present(station[late]):
            kept = self.late_rows.setdefault(int(st), [])
            room = min(LATE_CAP - len(kept), LATE_TOTAL_CAP - sum(len(v) for v in self.late_rows.values()))
            if room > 0:
                kept.extend(rows_of(np.flatnonzero(late & (station == st))[:room].tolist()))
        ident = np.isin(np.asarray(tx["function"], np.int64), [0x11, 0x2B]) & np.isin(
            outcome, [_OUTCOME_INDEX["ok"], _OUTCOME_INDEX["late"]])
        for i in np.flatnonzero(ident):
            st = int(station[i])
            known = self.device_ids.setdefault(st, [])
            if len(known) >= DEVICE_IDS_PER_STATION:
                continue
            text = device_id_text(bytes(_take(tx["response_raw"], np.array([i]))[0]))
            if text and text not in known:
                known.append(text)

    def add_events(self, events: pd.DataFrame) -> None:
        """Damage and notable traffic, counted per station and kind and per minute."""
        if events.empty:
            return
        t = np.asarray(events["t_ns"], np.int64)
        self._span(t)
        kind = _codes(events["kind"], EVENT_KINDS, _KIND_INDEX["other"])
        station = np.asarray(events["station"], np.int64)
        row = np.where((station >= 0) & (station < N_ADDR), station + 1, 0)
        self.events += np.bincount(row * len(EVENT_KINDS) + kind,
                                   minlength=(N_ADDR + 1) * len(EVENT_KINDS)).reshape(N_ADDR + 1, len(EVENT_KINDS))
        raw_len = np.fromiter(map(len, events["raw"]), np.int64, len(events))
        damage = np.isin(kind, [_KIND_INDEX[k] for k in _DAMAGE_KINDS])
        busy = raw_len * self.char_ns * damage
        self.busy_ns += float(busy.sum())
        minute = self._minute(t)
        data = self.bus_minutes.ensure(int(minute.max()) + 1)
        np.add.at(data[:, 0], minute, busy / 1e6)
        np.add.at(data, (minute, len(BUS_MINUTE_COLUMNS) + kind), 1)
        # A truncated frame failed its CRC check too: both count as the station's CRC errors.
        for names, col in ((("crc_error", "truncated"), 7), (("collision",), 8)):
            sel = np.isin(kind, [_KIND_INDEX[n] for n in names]) & (row > 0)
            for st in np.unique(station[sel]):
                m = minute[sel & (station == st)]
                series = self.station_minutes.setdefault(int(st), _Growing(len(MINUTE_COLUMNS)))
                np.add.at(series.ensure(int(m.max()) + 1)[:, col], m, 1)

    # -- handing over ------------------------------------------------------------------------------

    def figures(self, copy: bool = True) -> Figures:
        """The plain, mergeable figures so far: a copy (feeding on does not change them), or, with
        ``copy=False`` for an accumulator that is done, its own arrays handed over."""
        def rows(heaps: dict) -> dict:
            return {int(st): [(float(rt), tx_row(self.t0_ns, *r.row)) for rt, _t, _seq, r in sorted(h, key=lambda x: x[:3])]
                    for st, h in heaps.items() if h}

        edges = {"first_request_ns": self.first_request_ns.copy(), "last_request_ns": self.last_request_ns.copy(),
                 "first_frame_ns": self._first_frame_start_ns, "last_frame_end_ns": self._last_frame_end_ns,
                 "lead_request_ns": self._lead_request_ns, "pending_timeout": self._pending_timeout}
        return Figures(
            t0_ns=self.t0_ns, char_ns=self.char_ns, utc0_ns=self.utc0_ns, minute0=self.minute0,
            capture_ids=[self.capture_id] if self.capture_id else [],
            **{name: getattr(self, name).copy() if copy else getattr(self, name) for name in _ARRAYS},
            frames=self.frames, frame_bytes=self.frame_bytes, busy_ns=self.busy_ns, first_ns=self.first_ns,
            last_ns=self.last_ns, unknown_outcomes=self.unknown_outcomes,
            largest_gaps=sorted(self.largest_gaps, reverse=True),
            worst=rows(self.worst), slow=rows(self.slow),
            failures={st: list(v) for st, v in self.failures.items()},
            late_rows={st: list(v) for st, v in self.late_rows.items()},
            device_ids={st: list(v) for st, v in self.device_ids.items()},
            station_minutes={st: g.view().copy() for st, g in self.station_minutes.items()},
            station_minute_rt={st: g.view().copy() for st, g in self.station_minute_rt.items()},
            station_minute_max={st: g.view().copy() for st, g in self.station_minute_max.items()},
            bus_minutes=self.bus_minutes.view().copy(), edges=edges)


#: Arrays of counts and extremes that every part adds (or min/max) into the whole.
_ADDED = ("outcomes", "retries", "exception_codes", "functions", "rt_mid", "rt_low", "rt_high", "halfwidth",
          "poll", "move_on", "move_on_sum_ms", "events", "gaps", "in_time")
_ARRAYS = _ADDED + ("rt_min", "rt_max", "ok_max", "slow_dropped")


def _shift_rows(rows: list, shift_s: float) -> list:
    return rows if not shift_s else [dict(r, t_s=r["t_s"] + shift_s) for r in rows]


def _aligned(parts: list[tuple[int, np.ndarray]], fill: float, how: str) -> np.ndarray | None:
    """Series (first absolute minute, rows) put on one minute axis, added (or fmax-ed) where they overlap."""
    parts = [(m0, a) for m0, a in parts if a is not None]
    if not parts:
        return None
    lo = min(m0 for m0, _ in parts)
    hi = max(m0 + len(a) for m0, a in parts)
    out = np.full((hi - lo,) + parts[0][1].shape[1:], fill, dtype=parts[0][1].dtype)
    for m0, a in parts:
        view = out[m0 - lo: m0 - lo + len(a)]
        if how == "max":
            np.fmax(view, a, out=view)
        else:
            view += a
    return out


@dataclass
class Figures:
    """Plain, mergeable figures of a capture, of one part of it, or of many captures.

    No feeding state and no open files: arrays of exact counts, log-spaced histograms (they merge
    by adding), capped example lists, and per-minute series whose row 0 is the absolute minute
    ``minute0``: whole minutes of UTC since 1970 when the capture states its wall clock
    (``utc0_ns``), else whole minutes of the record clock since ``t0_ns``. Times in example rows
    (``t_s``) count from ``t0_ns``. ``merge`` of the figures of the parts of a rotated capture
    equals the figures of the whole; figures are judged against the master's timeout
    (``judged``) once, after merging.
    """

    t0_ns: int
    char_ns: float
    utc0_ns: int | None
    minute0: int
    capture_ids: list
    outcomes: np.ndarray
    retries: np.ndarray
    exception_codes: np.ndarray
    functions: np.ndarray
    rt_mid: np.ndarray
    rt_low: np.ndarray
    rt_high: np.ndarray
    halfwidth: np.ndarray
    poll: np.ndarray
    move_on: np.ndarray
    move_on_sum_ms: np.ndarray
    events: np.ndarray
    gaps: np.ndarray
    in_time: np.ndarray
    rt_min: np.ndarray
    rt_max: np.ndarray
    ok_max: np.ndarray
    slow_dropped: np.ndarray
    frames: int
    frame_bytes: int
    busy_ns: float
    first_ns: int | None
    last_ns: int | None
    unknown_outcomes: int
    largest_gaps: list          #: [(gap_ms, t_ns)], longest first
    worst: dict                 #: station -> [(response_ms, row)], fastest first, at most WORST_PER_STATION
    slow: dict                  #: station -> [(response_ms, row)]: slowest in-time answers, at most SLOW_KEEP
    failures: dict              #: station -> [row], first in time
    late_rows: dict             #: station -> [row], in time order
    device_ids: dict            #: station -> [str]
    station_minutes: dict       #: station -> (minutes, len(MINUTE_COLUMNS)) counts
    station_minute_rt: dict     #: station -> (minutes, COARSE.count) response-time counts
    station_minute_max: dict    #: station -> (minutes, 1) slowest answer (NaN: none)
    bus_minutes: np.ndarray     #: (minutes, busy_ms, frames, bytes, *event kinds)
    edges: dict = field(default_factory=dict)  #: first/last facts joining contiguous parts of one capture
    judged_ms: float | None = None
    judged: bool = False

    # -- time ----------------------------------------------------------------------------------

    @property
    def anchor_ns(self) -> int:
        return self.utc0_ns or 0

    def record_ns_of_minute(self, minute: int) -> int:
        """Record-clock time where row ``minute`` of the per-minute series begins."""
        return self.t0_ns + (self.minute0 + minute) * NS_PER_MIN - self.anchor_ns

    def minute_of(self, t_ns: int) -> int:
        """Row of the per-minute series holding record-clock time ``t_ns``."""
        return max(0, (int(t_ns) - self.t0_ns + self.anchor_ns) // NS_PER_MIN - self.minute0)

    @property
    def minutes(self) -> int:
        return int(max([len(self.bus_minutes)] + [len(a) for a in self.station_minutes.values()]))

    # -- merging ---------------------------------------------------------------------------------

    @staticmethod
    def merge(parts: list[Figures]) -> Figures:
        """Figures of all ``parts`` together (files, nights, ports), in any order.

        Every count and histogram is exact. Parts of one capture (same capture id) that follow
        each other are joined at their seams: the silence, poll interval and master move-on
        that span the seam are counted as the whole capture counts them. Times take the
        earliest part's clock; parts without a wall clock must share a record clock.
        """
        if not parts:
            raise ValueError("nothing to merge")
        if any(p.judged for p in parts):
            raise ValueError("figures are merged before their answers are judged against a timeout")
        anchored = {p.utc0_ns is not None for p in parts}
        if len(anchored) > 1:
            raise ValueError("figures with and without a wall clock cannot be merged")

        def start(p: Figures) -> int:  # position on the shared clock: UTC, or the record clock
            base = p.first_ns if p.first_ns is not None else p.t0_ns
            return base - p.t0_ns + p.anchor_ns if p.utc0_ns is not None else base

        parts = sorted(parts, key=start)
        base = parts[0]

        def delta(p: Figures) -> int:  # record clock of p -> record clock of base
            if p.utc0_ns is None:
                return 0
            return (p.utc0_ns - p.t0_ns) - (base.utc0_ns - base.t0_ns)

        out = Figures(
            t0_ns=base.t0_ns, char_ns=base.char_ns, utc0_ns=base.utc0_ns, minute0=0,
            capture_ids=list(dict.fromkeys(c for p in parts for c in p.capture_ids)),
            **{name: getattr(base, name).copy() for name in _ARRAYS},
            frames=0, frame_bytes=0, busy_ns=0.0, first_ns=None, last_ns=None, unknown_outcomes=0,
            largest_gaps=[], worst={}, slow={}, failures={}, late_rows={}, device_ids={}, station_minutes={},
            station_minute_rt={}, station_minute_max={}, bus_minutes=base.bus_minutes[:0].copy(), edges={})
        for name in _ADDED:
            setattr(out, name, sum(getattr(p, name) for p in parts))
        for name, fn in (("rt_min", np.fmin), ("rt_max", np.fmax), ("ok_max", np.fmax), ("slow_dropped", np.fmax)):
            setattr(out, name, reduce(fn, [getattr(p, name) for p in parts]))
        for name in ("frames", "frame_bytes", "busy_ns", "unknown_outcomes"):
            setattr(out, name, sum(getattr(p, name) for p in parts))
        firsts = [p.first_ns + delta(p) for p in parts if p.first_ns is not None]
        lasts = [p.last_ns + delta(p) for p in parts if p.last_ns is not None]
        out.first_ns = min(firsts) if firsts else None
        out.last_ns = max(lasts) if lasts else None
        gaps = [(g, t + delta(p)) for p in parts for g, t in p.largest_gaps]
        # the seams between parts of one capture
        for a, b in zip(parts, parts[1:]):
            if not (a.capture_ids and a.capture_ids == b.capture_ids and a.edges and b.edges):
                continue
            ea, eb = a.edges, b.edges
            if ea.get("last_frame_end_ns") is not None and eb.get("first_frame_ns") is not None:
                gap = max(eb["first_frame_ns"] - ea["last_frame_end_ns"], 0) / 1e6
                out.gaps += np.bincount(FINE.index(np.array([gap])), minlength=FINE.count)
                gaps.append((gap, eb["first_frame_ns"] + delta(b)))
            both = (ea["last_request_ns"] >= 0) & (eb["first_request_ns"] >= 0)
            both[0] = False
            if both.any():
                st = np.flatnonzero(both)
                _add_hist(out.poll, st, np.maximum((eb["first_request_ns"][st] - ea["last_request_ns"][st]) / 1e6, 0))
            if ea.get("pending_timeout") is not None and eb.get("lead_request_ns") is not None:
                st, t_end = ea["pending_timeout"]
                gap = max((eb["lead_request_ns"] - t_end) / 1e6, 0.0)
                _add_hist(out.move_on, np.array([st]), np.array([gap]))
                out.move_on_sum_ms[st] += gap
        out.largest_gaps = sorted(gaps, reverse=True)[:LARGEST_GAPS]
        if len(parts) > 0:
            first, last = parts[0].edges, parts[-1].edges
            if first and last:
                fr = np.full(N_ADDR, -1, np.int64)
                lr = np.full(N_ADDR, -1, np.int64)
                for p in parts:  # earliest first request, latest last request, on the base clock
                    if not p.edges:
                        continue
                    f = np.where(p.edges["first_request_ns"] >= 0, p.edges["first_request_ns"] + delta(p), -1)
                    fr = np.where((fr < 0) | ((f >= 0) & (f < fr)), f, fr)
                    la = np.where(p.edges["last_request_ns"] >= 0, p.edges["last_request_ns"] + delta(p), -1)
                    lr = np.maximum(lr, la)
                out.edges = {"first_request_ns": fr, "last_request_ns": lr,
                             "first_frame_ns": first.get("first_frame_ns"),
                             "last_frame_end_ns": last.get("last_frame_end_ns"),
                             "lead_request_ns": first.get("lead_request_ns"),
                             "pending_timeout": last.get("pending_timeout")}
        # example lists, times moved onto the base clock
        for p in parts:
            shift = (delta(p) + p.t0_ns - base.t0_ns) / 1e9
            for target, source in ((out.worst, p.worst), (out.slow, p.slow)):
                for st, rows in source.items():
                    moved = _shift_rows([r for _, r in rows], shift)
                    target.setdefault(st, []).extend(zip([rt for rt, _ in rows], moved))
            for target, source in ((out.failures, p.failures), (out.late_rows, p.late_rows)):
                for st, rows in source.items():
                    target.setdefault(st, []).extend(_shift_rows(rows, shift))
            for st, ids in p.device_ids.items():
                mine = out.device_ids.setdefault(st, [])
                mine.extend(i for i in ids if i not in mine)
                del mine[DEVICE_IDS_PER_STATION:]
        for st, rows in out.worst.items():
            out.worst[st] = sorted(rows, key=lambda x: (x[0], x[1]["t_s"]))[-WORST_PER_STATION:]
        for st, rows in out.slow.items():
            rows = sorted(rows, key=lambda x: (x[0], x[1]["t_s"]))
            if len(rows) > SLOW_KEEP:
                out.slow_dropped[st] = max(out.slow_dropped[st], rows[-SLOW_KEEP - 1][0])
            out.slow[st] = rows[-SLOW_KEEP:]
        for st in out.failures:
            out.failures[st] = sorted(out.failures[st], key=lambda r: r["t_s"])[:FAILURES_PER_STATION]
        for st in out.late_rows:
            out.late_rows[st] = sorted(out.late_rows[st], key=lambda r: r["t_s"])[:LATE_CAP]
        _cap_late(out.late_rows)
        # per-minute series on one absolute minute axis
        stations = sorted({st for p in parts for st in p.station_minutes} | {st for p in parts for st in p.station_minute_rt})
        axis_parts = [(p.minute0, p.bus_minutes) for p in parts]
        out.minute0 = min(m0 for m0, _ in axis_parts)
        for target, name, fill, how in ((out.station_minutes, "station_minutes", 0, "add"),
                                        (out.station_minute_rt, "station_minute_rt", 0, "add"),
                                        (out.station_minute_max, "station_minute_max", np.nan, "max")):
            for st in stations:
                series = _aligned([(p.minute0, getattr(p, name).get(st)) for p in parts], fill, how)
                if series is not None:
                    target[st] = series
        out.bus_minutes = _aligned(axis_parts, 0.0, "add")
        out._realign(parts, stations)
        return out

    def _realign(self, parts: list[Figures], stations: list[int]) -> None:
        """Series built from parts start at the first part holding them: pad them to start at minute0."""
        for name, fill in (("station_minutes", 0), ("station_minute_rt", 0), ("station_minute_max", np.nan)):
            target = getattr(self, name)
            for st in stations:
                if st not in target:
                    continue
                first = min(p.minute0 for p in parts if st in getattr(p, name))
                lead = first - self.minute0
                if lead:
                    series = target[st]
                    pad = np.full((lead,) + series.shape[1:], fill, dtype=series.dtype)
                    target[st] = np.concatenate([pad, series])

    # -- judging against the timeout ----------------------------------------------------------------

    def judge(self, timeout_ms: float | None) -> int:
        """Count answers the master awaited but that came after ``timeout_ms`` as late; return how many.

        The decoder records facts only (an answer before the master moved on is in time); the
        timeout, given or inferred, is known once the capture has been read (and merged), and this
        applies it once, the same way for both. Exact while a station gave fewer than SLOW_KEEP
        in-time answers over the timeout; beyond that its count comes from the response-time histogram.
        """
        if self.judged:
            raise ValueError("the answers were already judged against a timeout")
        self.judged = True
        self.judged_ms = timeout_ms
        if timeout_ms is None:
            return 0
        moved = 0
        ok, exc, late = (_OUTCOME_INDEX[o] for o in ("ok", "exception", "late"))
        for st, kept in self.slow.items():
            rows = sorted((r for r in kept if r[0] > timeout_ms), key=lambda r: r[1]["t_s"])
            if not rows:
                continue
            if self.slow_dropped[st] > timeout_ms:
                # more answers over the timeout than were kept: the rest from the histogram
                extra = max(0, count_above(self.rt_mid[st], timeout_ms, FINE) - len(rows)
                            - int(self.outcomes[st, late]))
                take = min(extra, int(self.outcomes[st, ok]))
                self.outcomes[st, ok] -= take
                self.outcomes[st, late] += take
                moved += take
            series = self.station_minutes.get(st)
            for _rt, r in rows:
                was = ok if r["outcome"] == "ok" else exc
                self.outcomes[st, was] -= 1
                self.outcomes[st, late] += 1
                if was == exc:
                    self.exception_codes[st, r["exception_code"]] -= 1
                if series is not None:
                    m = self.minute_of(self.t0_ns + round(r["t_s"] * 1e9))
                    if m >= len(series):
                        series = np.concatenate([series, np.zeros((m + 1 - len(series), series.shape[1]),
                                                                  series.dtype)])
                        self.station_minutes[st] = series
                    series[m, 1 if was == ok else 2] -= 1
                    series[m, 4] += 1
                kept_late = self.late_rows.setdefault(st, [])
                if len(kept_late) < LATE_CAP and sum(len(v) for v in self.late_rows.values()) < LATE_TOTAL_CAP:
                    kept_late.append(dict(r, outcome="late", exception_code=0))
            self.late_rows[st] = sorted(self.late_rows[st], key=lambda r: r["t_s"])
            moved += len(rows)
        return moved

    # -- reading out -----------------------------------------------------------------------------

    def stations_seen(self) -> list[int]:
        """Addresses that answered at least once or were polled at least MIN_POLLS times (0 excluded).

        Noise can read as a request to an address nobody uses; such stray addresses are listed
        apart (``stray_addresses``) instead of as stations.
        """
        answered = self.outcomes[:, [_OUTCOME_INDEX[o] for o in ("ok", "exception", "late")]].sum(axis=1)
        answered = answered + self.events[1:, _KIND_INDEX["unexpected_responder"]]
        seen = np.flatnonzero((answered > 0) | (self.outcomes.sum(axis=1) >= MIN_POLLS))
        return [int(a) for a in seen if a != 0]

    def stray_addresses(self) -> dict[int, int]:
        """Addresses polled (or read from noise) too rarely to count as stations: address -> requests."""
        seen = set(self.stations_seen())
        polled = self.outcomes.sum(axis=1)
        return {int(a): int(polled[a]) for a in np.flatnonzero(polled) if a != 0 and int(a) not in seen}

    def judged_copy(self, timeout_ms: float | None) -> Figures:
        """A copy judged against ``timeout_ms``; this one stays mergeable."""
        out = dataclasses.replace(self)  # shares what judging leaves alone; copies what it changes
        out.outcomes, out.exception_codes = self.outcomes.copy(), self.exception_codes.copy()
        out.station_minutes = {st: a.copy() for st, a in self.station_minutes.items()}
        out.late_rows = {st: list(rows) for st, rows in self.late_rows.items()}
        out.judge(timeout_ms)
        return out



def _cap_late(late_rows: dict) -> None:
    """Keep at most LATE_TOTAL_CAP late answers listed over all stations (the most listed lose first)."""
    excess = sum(len(v) for v in late_rows.values()) - LATE_TOTAL_CAP
    for st in sorted(late_rows, key=lambda a: -len(late_rows[a])):
        if excess <= 0:
            break
        drop = min(excess, len(late_rows[st]) - 1)
        if drop > 0:
            del late_rows[st][-drop:]
            excess -= drop


def _q(counts: np.ndarray, q: float, bins: LogBins = FINE, vmin: float | None = None,
       vmax: float | None = None) -> float | None:
    value = quantile(counts, q, bins, vmin, vmax)
    return None if value is None else round(value, 3)


QUANTILES = (("p50", 0.50), ("p95", 0.95), ("p99", 0.99))


def response_figures(acc: Figures, address: int) -> dict:
    """min/p50/p95/p99/max of one station's response times, each quantile with its interval."""
    mid, low, high = acc.rt_mid[address], acc.rt_low[address], acc.rt_high[address]
    vmin = float(acc.rt_min[address]) if np.isfinite(acc.rt_min[address]) else None
    vmax = float(acc.rt_max[address]) if np.isfinite(acc.rt_max[address]) else None
    out: dict = {"min": None if vmin is None else round(vmin, 3)}
    intervals: dict = {}
    for name, q in QUANTILES:
        out[name] = _q(mid, q, vmin=vmin, vmax=vmax)
        lo, hi = _q(low, q), _q(high, q)
        intervals[name] = None if lo is None else [round(lo / (1 + FINE.relative_resolution), 3),
                                                   round(hi * (1 + FINE.relative_resolution), 3)]
    out["max"] = None if vmax is None else round(vmax, 3)
    return {"response_ms": out, "response_ms_interval": intervals,
            "timing_halfwidth_ms": _q(acc.halfwidth[address], 0.5)}


def minute_bands(acc: Figures, address: int) -> dict:
    """Per-minute p50, p95 and max response time of one station (NaN where it did not answer)."""
    counts = acc.station_minute_rt.get(address)
    mx = acc.station_minute_max.get(address)
    if counts is None or mx is None:
        return {"p50": [], "p95": [], "max": []}
    return {"p50": quantiles_rows(counts, 0.5, COARSE).tolist(), "p95": quantiles_rows(counts, 0.95, COARSE).tolist(),
            "max": mx[:, 0].tolist()}


def above(acc: Figures, address: int, threshold_ms: float) -> int:
    """Answers whose response time lies wholly above ``threshold_ms`` (from the histogram)."""
    return count_above(acc.rt_mid[address], threshold_ms, FINE)
