"""Per-station and bus accumulators: fed table blocks from the decoder, merged, then finalised.

Streaming by design: every block of frames, transactions and events updates fixed-size
arrays (counts are exact; response-time quantiles come from log-spaced histograms of the
midpoints *and* of both ends of each interval, so a quantile is reported with the interval
the timestamps allow). Memory grows only with the number of minutes (the time series) and is
capped for the example lists (worst transactions, late answers: the counts stay exact).
"""

from __future__ import annotations

import heapq
import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
from buswitness.analysis.devid import device_id_text
from buswitness.analysis.histogram import COARSE, FINE, LogBins, count_above, quantile, quantiles_rows
from buswitness.decode.events import EVENT_KINDS as DECODER_EVENT_KINDS
from buswitness.decode.events import OUTCOMES

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


def _codes(values: pd.Series, vocabulary: tuple[str, ...], fallback: int) -> np.ndarray:
    """Index of each value in ``vocabulary`` (``fallback`` for anything else), fast for categoricals."""
    index = {name: i for i, name in enumerate(vocabulary)}
    if isinstance(values.dtype, pd.CategoricalDtype):
        lookup = np.array([index.get(str(c), fallback) for c in values.cat.categories] + [fallback], np.int64)
        return lookup[values.cat.codes.to_numpy(np.int64)]  # code -1 (missing) takes the last entry
    uniques, inverse = np.unique(values.to_numpy(dtype=object).astype(str), return_inverse=True)
    lookup = np.array([index.get(u, fallback) for u in uniques.tolist()], np.int64)
    return lookup[inverse.reshape(-1)]


def _add_hist(target: np.ndarray, station: np.ndarray, values_ms: np.ndarray) -> None:
    """Count ``values_ms`` into the rows ``station`` of a (station, FINE bin) histogram."""
    stations, compact = np.unique(station, return_inverse=True)
    counts = np.bincount(compact.reshape(-1) * FINE.count + FINE.index(values_ms),
                         minlength=len(stations) * FINE.count).reshape(len(stations), FINE.count)
    target[stations] += counts


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


@dataclass
class Accumulator:
    """Everything the analysis keeps while the capture streams past; ``merge`` adds two together."""

    t0_ns: int  #: the capture start the file states, on the record clock: every reported time counts from it
    char_ns: float
    minute0: int = 0  #: minute (since t0_ns) of the per-minute series' first row
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
    worst: dict = field(default_factory=dict)            # station -> heap of (response_ms, seq, row)
    failures: dict = field(default_factory=dict)         # station -> list of rows
    late_rows: dict = field(default_factory=dict)        # station -> list of rows
    slow: dict = field(default_factory=dict)             # station -> heap of (response_ms, seq, row): in time, slowest
    slow_dropped: np.ndarray = field(default_factory=lambda: np.full(N_ADDR, -np.inf))  #: slowest one dropped
    judged_ms: float | None = None  #: the timeout the in-time answers were judged against (judge())
    device_ids: dict = field(default_factory=dict)       # station -> list of str
    station_minutes: dict = field(default_factory=dict)  # station -> _Growing(len(MINUTE_COLUMNS))
    station_minute_rt: dict = field(default_factory=dict)   # station -> _Growing(COARSE.count, np.int32)
    station_minute_max: dict = field(default_factory=dict)  # station -> _Growing(1, float, nan)
    bus_minutes: _Growing = field(default_factory=lambda: _Growing(len(BUS_MINUTE_COLUMNS) + len(EVENT_KINDS),
                                                                    np.float64))
    _last_frame_end_ns: int | None = None
    _pending_timeout: tuple | None = None  # (station, t_request_end_ns) awaiting the next request
    _prev_tx: tuple = (-1, -1)  # (station, t_response_start_ns) of the last transaction seen
    _seq: int = 0

    # -- feeding ---------------------------------------------------------------------------------

    def _minute(self, t_ns: np.ndarray) -> np.ndarray:
        return np.maximum((np.asarray(t_ns, np.int64) - self.t0_ns) // NS_PER_MIN - self.minute0, 0)

    def _span(self, t_ns: np.ndarray) -> None:
        if len(t_ns):
            lo, hi = int(t_ns.min()), int(t_ns.max())
            self.first_ns = lo if self.first_ns is None else min(self.first_ns, lo)
            self.last_ns = hi if self.last_ns is None else max(self.last_ns, hi)

    def add_frames(self, frames: pd.DataFrame) -> None:
        """Bus traffic: frames, bytes, line busy time, silences between frames."""
        if frames.empty:
            return
        t_start = frames["t_start_ns"].to_numpy(np.int64)
        t_end = frames["t_end_ns"].to_numpy(np.int64)
        length = frames["length"].to_numpy(np.int64)
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
            gap_ms, starts_g = gap_ms[1:], starts[1:]
        else:
            starts_g = starts
        gap_ms = np.maximum(gap_ms, 0.0)
        self._last_frame_end_ns = int(max(ends.max(), self._last_frame_end_ns or ends.max()))
        if len(gap_ms):
            self.gaps += np.bincount(FINE.index(gap_ms), minlength=FINE.count)
            top = np.lexsort((starts_g, gap_ms))[-LARGEST_GAPS:]
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
        if not tx["t_request_end_ns"].is_monotonic_increasing:
            tx = tx.sort_values("t_request_end_ns", kind="stable")
        t_req = tx["t_request_end_ns"].to_numpy(np.int64)
        self._span(t_req)
        station = tx["station"].to_numpy(np.int64)
        function = tx["function"].to_numpy(np.int64)
        outcome = _codes(tx["outcome"], OUTCOMES, -1)
        self.unknown_outcomes += int((outcome < 0).sum())
        known = outcome >= 0
        self.outcomes += np.bincount(station[known] * len(OUTCOMES) + outcome[known],
                                     minlength=N_ADDR * len(OUTCOMES)).reshape(N_ADDR, len(OUTCOMES))
        retry = tx["retry"].to_numpy(bool)
        self.retries += np.bincount(station[retry], minlength=N_ADDR)
        exc = outcome == _OUTCOME_INDEX["exception"]
        if exc.any():
            codes = tx["exception_code"].to_numpy(np.int64)[exc]
            self.exception_codes += np.bincount(station[exc] * 256 + codes, minlength=N_ADDR * 256).reshape(N_ADDR, 256)
        self.functions += np.bincount(station * 256 + function, minlength=N_ADDR * 256).reshape(N_ADDR, 256)

        rt = tx["response_ms"].to_numpy(np.float64)
        lo = tx["response_ms_low"].to_numpy(np.float64)
        hi = tx["response_ms_high"].to_numpy(np.float64)
        timed = np.isfinite(rt) & np.isin(outcome, [_OUTCOME_INDEX[o] for o in ("ok", "exception", "late")])
        if timed.any():
            s = station[timed]
            for hist, values in ((self.rt_mid, rt), (self.rt_low, np.where(np.isfinite(lo), lo, rt)),
                                 (self.rt_high, np.where(np.isfinite(hi), hi, rt))):
                _add_hist(hist, s, values[timed])
            _add_hist(self.halfwidth, s, np.where(np.isfinite(hi) & np.isfinite(lo), (hi - lo) / 2, 0.0)[timed])
            np.fmin.at(self.rt_min, s, rt[timed])
            np.fmax.at(self.rt_max, s, rt[timed])
            in_time = timed & np.isin(outcome, [_OUTCOME_INDEX["ok"], _OUTCOME_INDEX["exception"]])
            np.fmax.at(self.ok_max, station[in_time], rt[in_time])
            self.in_time += np.bincount(FINE.index(rt[in_time]), minlength=FINE.count)

        self._poll_cycle(station, t_req)
        self._move_on(tx, station, outcome, t_req)
        self._station_minutes(station, outcome, retry, rt, timed, t_req)
        self._examples(tx, station, outcome, rt, timed, t_req)

    def _poll_cycle(self, station: np.ndarray, t_req: np.ndarray) -> None:
        order = np.lexsort((t_req, station))
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

    def _move_on(self, tx: pd.DataFrame, station: np.ndarray, outcome: np.ndarray, t_req: np.ndarray) -> None:
        """Silence after an unanswered request until the master's next request: its timeout at work.

        Not where the station's late answer to its previous request came during that silence (a
        retry, and the answer to the first attempt after it): the master may have taken that
        answer and moved on early, so the silence says nothing about its timeout.
        """
        resp = tx["t_response_start_ns"].to_numpy(np.int64)
        prev_station = np.concatenate(([self._prev_tx[0]], station[:-1]))
        prev_resp = np.concatenate(([self._prev_tx[1]], resp[:-1]))
        self._prev_tx = (int(station[-1]), int(resp[-1]))
        timeout = (outcome == _OUTCOME_INDEX["timeout"]) & ~((prev_station == station) & (prev_resp > t_req))
        if self._pending_timeout is None and not timeout.any():
            return
        need = np.zeros(len(tx), bool)
        need[0] = True
        need[1:] = timeout[:-1]
        req_len = np.zeros(len(tx), np.int64)
        raw = tx["request_raw"].to_numpy(dtype=object)
        req_len[need] = [len(r) for r in raw[need]]
        next_start = t_req - (req_len * self.char_ns).astype(np.int64)
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
        stations, compact = np.unique(station, return_inverse=True)
        compact = compact.reshape(-1)
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
        rt_bin = COARSE.index(np.where(timed, rt, 1.0))
        for j, st in enumerate(stations.tolist()):
            data = self.station_minutes.setdefault(st, _Growing(n_col)).ensure(n_min)
            data[m0:n_min] += counts[j]
            tsel = timed & (compact == j)
            if tsel.any():
                hist = self.station_minute_rt.setdefault(st, _Growing(COARSE.count, np.int32)).ensure(n_min)
                hist[m0:n_min] += np.bincount(rel[tsel] * COARSE.count + rt_bin[tsel],
                                              minlength=n_rel * COARSE.count).reshape(n_rel, COARSE.count)
                mx = self.station_minute_max.setdefault(st, _Growing(1, np.float64, np.nan)).ensure(n_min)
                np.fmax.at(mx[:, 0], minute[tsel], rt[tsel])

    def _examples(self, tx: pd.DataFrame, station: np.ndarray, outcome: np.ndarray, rt: np.ndarray,
                  timed: np.ndarray, t_req: np.ndarray) -> None:
        cols = ("t_request_end_ns", "station", "function", "outcome", "response_ms", "response_ms_low",
                "response_ms_high", "exception_code", "retry", "request_raw", "response_raw")
        arrays: dict = {}

        def row(i: int) -> dict:
            if not arrays:
                arrays.update({c: tx[c].to_numpy(dtype=object) for c in cols})
            return tx_row(self.t0_ns, *(arrays[c][i] for c in cols))

        for st in np.unique(station[timed]):
            heap = self.worst.setdefault(int(st), [])
            floor = heap[0][0] if len(heap) >= WORST_PER_STATION else -np.inf
            idx = np.flatnonzero(timed & (station == st) & (rt > floor))
            top = idx[np.argsort(rt[idx])[-WORST_PER_STATION:]]
            for i in top:
                self._seq += 1
                item = (float(rt[i]), self._seq, row(int(i)))
                if len(heap) < WORST_PER_STATION:
                    heapq.heappush(heap, item)
                elif item[0] > heap[0][0]:
                    heapq.heapreplace(heap, item)
        in_time = timed & np.isin(outcome, [_OUTCOME_INDEX["ok"], _OUTCOME_INDEX["exception"]])
        for st in np.unique(station[in_time]):
            heap = self.slow.setdefault(int(st), [])
            floor = heap[0][0] if len(heap) >= SLOW_KEEP else -np.inf
            idx = np.flatnonzero(in_time & (station == st) & (rt > floor))
            if len(idx) > SLOW_KEEP:
                cut = idx[np.argsort(rt[idx], kind="stable")[:-SLOW_KEEP]]
                self.slow_dropped[st] = max(self.slow_dropped[st], float(rt[cut].max()))
                idx = np.setdiff1d(idx, cut)
            for i in idx:
                self._seq += 1
                item = (float(rt[i]), self._seq, row(int(i)))
                if len(heap) < SLOW_KEEP:
                    heapq.heappush(heap, item)
                else:
                    gone = heapq.heappushpop(heap, item)
                    self.slow_dropped[st] = max(self.slow_dropped[st], gone[0])
        failed = np.isin(outcome, [_OUTCOME_INDEX["timeout"], _OUTCOME_INDEX["corrupt"]])
        for st in np.unique(station[failed]):
            kept = self.failures.setdefault(int(st), [])
            room = FAILURES_PER_STATION - len(kept)
            if room > 0:
                kept.extend(row(int(i)) for i in np.flatnonzero(failed & (station == st))[:room])
        late = outcome == _OUTCOME_INDEX["late"]
        for st in np.unique(station[late]):
            kept = self.late_rows.setdefault(int(st), [])
            room = min(LATE_CAP - len(kept), LATE_TOTAL_CAP - sum(len(v) for v in self.late_rows.values()))
            if room > 0:
                kept.extend(row(int(i)) for i in np.flatnonzero(late & (station == st))[:room])
        ident = np.isin(tx["function"].to_numpy(np.int64), [0x11, 0x2B]) & np.isin(
            outcome, [_OUTCOME_INDEX["ok"], _OUTCOME_INDEX["late"]])
        for i in np.flatnonzero(ident):
            st = int(station[i])
            known = self.device_ids.setdefault(st, [])
            if len(known) >= DEVICE_IDS_PER_STATION:
                continue
            text = device_id_text(bytes(tx["response_raw"].iat[int(i)]))
            if text and text not in known:
                known.append(text)

    def add_events(self, events: pd.DataFrame) -> None:
        """Damage and notable traffic, counted per station and kind and per minute."""
        if events.empty:
            return
        t = events["t_ns"].to_numpy(np.int64)
        self._span(t)
        kind = _codes(events["kind"], EVENT_KINDS, _KIND_INDEX["other"])
        station = events["station"].to_numpy(np.int64)
        row = np.where((station >= 0) & (station < N_ADDR), station + 1, 0)
        self.events += np.bincount(row * len(EVENT_KINDS) + kind,
                                   minlength=(N_ADDR + 1) * len(EVENT_KINDS)).reshape(N_ADDR + 1, len(EVENT_KINDS))
        raw_len = events["raw"].map(len).to_numpy(np.int64)
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

    # -- merging ---------------------------------------------------------------------------------

    def merge(self, other: Accumulator) -> None:
        """Add ``other`` (a later or parallel part of the same capture) into this one."""
        if other.t0_ns != self.t0_ns or other.minute0 != self.minute0:
            raise ValueError("accumulators of different capture starts cannot be merged")
        for name in ("outcomes", "retries", "exception_codes", "functions", "rt_mid", "rt_low", "rt_high",
                     "halfwidth", "poll", "move_on", "move_on_sum_ms", "events", "gaps", "in_time"):
            setattr(self, name, getattr(self, name) + getattr(other, name))
        self.rt_min = np.fmin(self.rt_min, other.rt_min)
        self.rt_max = np.fmax(self.rt_max, other.rt_max)
        self.ok_max = np.fmax(self.ok_max, other.ok_max)
        for name in ("frames", "frame_bytes", "busy_ns", "unknown_outcomes"):
            setattr(self, name, getattr(self, name) + getattr(other, name))
        spans = [x for x in (self.first_ns, other.first_ns) if x is not None]
        self.first_ns = min(spans) if spans else None
        spans = [x for x in (self.last_ns, other.last_ns) if x is not None]
        self.last_ns = max(spans) if spans else None
        self.largest_gaps = heapq.nlargest(LARGEST_GAPS, self.largest_gaps + other.largest_gaps)
        heapq.heapify(self.largest_gaps)
        for st, heap in other.worst.items():
            mine = heapq.nlargest(WORST_PER_STATION, self.worst.get(st, []) + heap, key=lambda x: (x[0], x[1]))
            heapq.heapify(mine)
            self.worst[st] = mine
        if self.judged_ms is not None or other.judged_ms is not None:
            raise ValueError("accumulators are merged before their answers are judged against a timeout")
        self.slow_dropped = np.fmax(self.slow_dropped, other.slow_dropped)
        for st, heap in other.slow.items():
            both = sorted(self.slow.get(st, []) + heap, key=lambda x: (x[0], x[1]))
            if len(both) > SLOW_KEEP:
                self.slow_dropped[st] = max(self.slow_dropped[st], both[-SLOW_KEEP - 1][0])
            self.slow[st] = both[-SLOW_KEEP:]
            heapq.heapify(self.slow[st])
        for target, source, cap in ((self.failures, other.failures, FAILURES_PER_STATION),
                                    (self.late_rows, other.late_rows, LATE_CAP)):
            for st, rows in source.items():
                merged = sorted(target.get(st, []) + rows, key=lambda r: r["t_s"])
                target[st] = merged[:cap]
        excess = sum(len(v) for v in self.late_rows.values()) - LATE_TOTAL_CAP
        for st in sorted(self.late_rows, key=lambda a: -len(self.late_rows[a])):
            if excess <= 0:
                break
            drop = min(excess, len(self.late_rows[st]) - 1)
            if drop > 0:
                del self.late_rows[st][-drop:]
                excess -= drop
        for st, ids in other.device_ids.items():
            mine = self.device_ids.setdefault(st, [])
            mine.extend(i for i in ids if i not in mine)
            del mine[DEVICE_IDS_PER_STATION:]
        for target, source, how in ((self.station_minutes, other.station_minutes, "add"),
                                    (self.station_minute_rt, other.station_minute_rt, "add"),
                                    (self.station_minute_max, other.station_minute_max, "max")):
            for st, series in source.items():
                if st in target:
                    target[st].merge(series, how)
                else:
                    target[st] = series
        self.bus_minutes.merge(other.bus_minutes)

    # -- judging against the timeout ----------------------------------------------------------------

    def judge(self, timeout_ms: float | None) -> int:
        """Count answers the master awaited but that came after ``timeout_ms`` as late; return how many.

        The decoder records facts only (an answer before the master moved on is in time); the
        timeout, given or inferred, is known once the capture has been read, and this applies it
        once, the same way for both. Exact while a station gave fewer than SLOW_KEEP in-time
        answers over the timeout; beyond that its count comes from the response-time histogram.
        """
        if self.judged_ms is not None:
            raise ValueError("the answers were already judged against a timeout")
        self.judged_ms = timeout_ms
        if timeout_ms is None:
            return 0
        moved = 0
        ok, exc, late = (_OUTCOME_INDEX[o] for o in ("ok", "exception", "late"))
        for st, heap in self.slow.items():
            rows = sorted((r for r in heap if r[0] > timeout_ms), key=lambda r: r[2]["t_s"])
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
            for _rt, _seq, r in rows:
                was = ok if r["outcome"] == "ok" else exc
                self.outcomes[st, was] -= 1
                self.outcomes[st, late] += 1
                if was == exc:
                    self.exception_codes[st, r["exception_code"]] -= 1
                if series is not None:
                    m = int(r["t_s"] * 1e9 // NS_PER_MIN) - self.minute0
                    data = series.ensure(m + 1)
                    data[m, 1 if was == ok else 2] -= 1
                    data[m, 4] += 1
                kept = self.late_rows.setdefault(st, [])
                if len(kept) < LATE_CAP and sum(len(v) for v in self.late_rows.values()) < LATE_TOTAL_CAP:
                    kept.append(dict(r, outcome="late", exception_code=0))
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


def _q(counts: np.ndarray, q: float, bins: LogBins = FINE, vmin: float | None = None,
       vmax: float | None = None) -> float | None:
    value = quantile(counts, q, bins, vmin, vmax)
    return None if value is None else round(value, 3)


QUANTILES = (("p50", 0.50), ("p95", 0.95), ("p99", 0.99))


def response_figures(acc: Accumulator, address: int) -> dict:
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


def minute_bands(acc: Accumulator, address: int) -> dict:
    """Per-minute p50, p95 and max response time of one station (NaN where it did not answer)."""
    hist = acc.station_minute_rt.get(address)
    mx = acc.station_minute_max.get(address)
    if hist is None or mx is None:
        return {"p50": [], "p95": [], "max": []}
    counts = hist.view()
    return {"p50": quantiles_rows(counts, 0.5, COARSE).tolist(), "p95": quantiles_rows(counts, 0.95, COARSE).tolist(),
            "max": mx.view()[:, 0].tolist()}


def above(acc: Accumulator, address: int, threshold_ms: float) -> int:
    """Answers whose response time lies wholly above ``threshold_ms`` (from the histogram)."""
    return count_above(acc.rt_mid[address], threshold_ms, FINE)
