"""Figures that add up: the parts of a rotated capture, analysed apart and merged, equal the whole.

The oracle is the analysis of the whole rotated set (itself checked against the simulator's
truth in test_analysis_truth.py): merging must not change a single count or histogram bin.

Source: the checks compare with what the test itself made (one pass over the whole capture); no check value comes from outside the project.
"""

from __future__ import annotations

import numpy as np
import pytest
from buswitness.analysis.figures import Figures
from buswitness.analysis.pipeline import AnalysisOptions, analyze
from buswitness.analysis.result import merge_results
from buswitness.capture.fileformat import CaptureReader, CaptureWriter
from buswitness.simulate import load_scenario, simulate

QUIET_NS = 30_000_000  #: a part begins after a silence this long ...
SETTLED = ("ok", "exception", "broadcast")  #: ... just after a transaction that is over


def _rest_points(reader: CaptureReader) -> np.ndarray:
    """Request ends that follow a settled transaction: the bus is at rest just before them."""
    import pandas as pd
    from buswitness.decode import Decoder, DecoderConfig
    decoder = Decoder(DecoderConfig.from_header(reader.header))
    tables = [decoder.feed_batch(b).transactions for b in reader.iter_batches()] + [decoder.flush().transactions]
    tx = pd.concat(tables, ignore_index=True).sort_values("t_request_end_ns")
    settled = tx["outcome"].astype(str).isin(SETTLED).to_numpy()
    return tx["t_request_end_ns"].to_numpy(np.int64)[1:][settled[:-1]]


def _rotated(tmp_path, scenario: str, seconds: float, every_s: float):
    sim = simulate(load_scenario(scenario), duration_s=seconds, seed=3)
    path = tmp_path / "night.bwcap"
    sim.write(path)
    reader = CaptureReader(path)
    records = list(reader.iter_records())
    rest = _rest_points(reader)
    (tmp_path / "rot").mkdir()
    with CaptureWriter(tmp_path / "rot" / "night.bwcap", reader.header) as w:
        last_cut = prev = records[0].t_ns
        for x in records:
            due = x.t_ns - last_cut >= every_s * 1e9 and x.t_ns - prev >= QUIET_NS
            if due:  # this read holds the start of a request that follows a settled transaction
                k = np.searchsorted(rest, x.t_ns - QUIET_NS)
                due = k < len(rest) and rest[k] <= x.t_ns + QUIET_NS
            if due:  # the writer rotates at its next block: make this record begin one
                w.flush()
                w.rotate_ns, last_cut = 0, x.t_ns
            w.append(x.port, x.t_ns, x.data, x.flags)
            if due:
                w.flush()
                w.rotate_ns = None
            prev = x.t_ns
    return w.parts


def _figures_equal(a: Figures, b: Figures) -> None:
    for name in ("outcomes", "retries", "exception_codes", "functions", "rt_mid", "rt_low", "rt_high", "halfwidth",
                 "poll", "move_on", "events", "gaps", "in_time"):
        assert np.array_equal(getattr(a, name), getattr(b, name)), name
    for name in ("rt_min", "rt_max", "ok_max"):
        assert np.array_equal(getattr(a, name), getattr(b, name), equal_nan=True), name
    assert np.allclose(a.move_on_sum_ms, b.move_on_sum_ms, rtol=0, atol=1e-6)
    assert (a.frames, a.frame_bytes, a.first_ns, a.last_ns, a.minute0) == (b.frames, b.frame_bytes, b.first_ns,
                                                                            b.last_ns, b.minute0)
    assert a.busy_ns == pytest.approx(b.busy_ns, abs=1e-3)
    for name in ("station_minutes", "station_minute_rt", "station_minute_max"):
        x, y = getattr(a, name), getattr(b, name)
        assert sorted(x) == sorted(y), name
        for st in x:
            assert np.array_equal(x[st], y[st], equal_nan=True), (name, st)
    assert np.allclose(a.bus_minutes, b.bus_minutes, rtol=0, atol=1e-6)
    assert a.largest_gaps == b.largest_gaps


# Scenarios whose pairing needs no history: the decoder learns what is usual for a late station over
# time, so a part decoded apart may pair a few late answers differently (decode/pairing.py).
@pytest.mark.parametrize("scenario", ["fault-absent", "fault-exceptions", "noisy"])
def test_merge_of_the_parts_of_a_rotated_set_equals_the_whole(tmp_path, scenario):
    parts = _rotated(tmp_path, scenario, 150.0, 35.0)
    assert len(parts) >= 4
    options = AnalysisOptions(progress=False)
    whole = analyze(CaptureReader(parts[0]), options)
    pieces = [analyze(CaptureReader(p, single_file=True), options) for p in parts]
    merged = merge_results(pieces[::-1])  # any order
    _figures_equal(merged.unjudged, whole.unjudged)
    assert merged.timeout.timeout_ms == whole.timeout.timeout_ms
    assert [s.to_dict() for s in merged.stations] == [s.to_dict() for s in whole.stations]
    assert merged.bus.to_dict() == whole.bus.to_dict()
    for s in whole.stations:
        np.testing.assert_equal(merged.station_series(s.address), whole.station_series(s.address))
        assert merged.late_answers(s.address) == whole.late_answers(s.address)
    assert merged.worst_transactions() == whole.worst_transactions()


def test_judged_figures_do_not_merge(tmp_path):
    parts = _rotated(tmp_path, "fault-late", 60.0, 20.0)
    r = analyze(CaptureReader(parts[0], single_file=True), AnalysisOptions(progress=False))
    with pytest.raises(ValueError, match="judged"):
        Figures.merge([r.figures, r.unjudged])


def _night(tmp_path, start_utc: str, seed: int):
    import dataclasses
    sc = dataclasses.replace(load_scenario("fault-absent"), start_utc=start_utc)
    path = tmp_path / f"n{seed}.bwcap"
    simulate(sc, duration_s=150.0, seed=seed).write(path)
    return analyze(CaptureReader(path), AnalysisOptions(progress=False))


def test_per_minute_rows_are_whole_minutes_of_utc(tmp_path):
    r = _night(tmp_path, "2026-12-01T22:00:30+00:00", 1)
    assert r.minute_start_s(0) == -30.0 and r.minute_start_s(1) == 30.0
    assert r.minute_utc_ns(0) % 60_000_000_000 == 0
    assert r.utc_at(r.minute_start_s(1)).startswith("2026-12-01T22:01:00")


def test_nights_merge_on_one_absolute_time_axis(tmp_path):
    a = _night(tmp_path, "2026-12-01T22:00:00+00:00", 1)
    b = _night(tmp_path, "2026-12-02T22:00:00+00:00", 2)
    m = merge_results([b, a])
    assert m.header.start_utc == a.header.start_utc  # the earlier night's clock
    for s in m.stations:
        sa, sb = a.station(s.address), b.station(s.address)
        assert s.requests == sa.requests + sb.requests and s.timeouts == sa.timeouts + sb.timeouts
        series = m.station_series(s.address)
        assert sum(series["requests"]) == s.requests
        # a day apart: the second night's first minute is row 1440 of the merged series
        assert series["requests"][1440:1443] == b.station_series(s.address)["requests"][:3]
    assert m.minutes() == 1440 + b.minutes()
    assert m.bus.frames == a.bus.frames + b.bus.frames


def test_the_slowest_answers_kept_do_not_depend_on_how_the_transactions_are_cut(monkeypatch):
    """Equal response times (a coarse adapter gives many; here the times are rounded to whole ms)
    are ranked by request time in the example lists, so one block or many (steps, segments, a
    decoder that went on) keep the very same rows."""
    from buswitness.analysis import figures as fig
    from buswitness.decode import Decoder, DecoderConfig
    monkeypatch.setattr(fig, "WORST_PER_STATION", 4)
    monkeypatch.setattr(fig, "SLOW_KEEP", 40)  # small lists: full early, then many ties at their edge
    sim = simulate(load_scenario("pumpstation"), duration_s=180.0, seed=5)
    decoder = Decoder(DecoderConfig.from_header(sim.header))
    outs = [decoder.feed_batch(b) for b in sim.batches()] + [decoder.flush()]
    tx = _joined_columns([o.columns()[1] for o in outs])
    tx.data["response_ms"] = np.round(np.asarray(tx["response_ms"], np.float64))  # whole ms: ties aplenty
    rt = tx.data["response_ms"]
    assert len(np.unique(rt[np.isfinite(rt)])) < np.isfinite(rt).sum() // 10

    def kept(cut_every: int) -> tuple:
        acc = fig.Accumulator(t0_ns=int(np.min(tx["t_request_end_ns"])), char_ns=1e6)
        for a in range(0, len(tx), cut_every):
            acc.add_transactions(tx.take(np.arange(a, min(a + cut_every, len(tx)))))
        f = acc.figures()
        return ({st: [(r, row["t_s"]) for r, row in rows] for st, rows in f.worst.items()},
                {st: [(r, row["t_s"]) for r, row in rows] for st, rows in f.slow.items()}, f.slow_dropped.tolist())

    whole = kept(len(tx))
    assert all(len(rows) == 4 for rows in whole[0].values())
    for every in (1000, 257, 31):
        assert kept(every) == whole, every


def _joined_columns(tables: list):
    """The rows of several Columns tables end to end (bytes columns as lists)."""
    from buswitness.decode.tables import Columns
    out: dict = {}
    for t in tables:
        for name, col in t.data.items():
            out.setdefault(name, []).append(col)
    return Columns({k: np.concatenate(v) if isinstance(v[0], np.ndarray) else [b for c in v for b in c]
                    for k, v in out.items()})


def test_answers_over_the_timeout_left_below_a_full_slow_list_still_count_as_late(monkeypatch):
    """The slow list is full of a bad hour's answers; later answers over the timeout but faster
    than all of those are left out of it at once. judge() must still count them late (from the
    histogram, as for answers pushed out of the list), in one pass as in merged segments."""
    from buswitness.analysis import figures as fig
    from buswitness.decode.events import OUTCOMES
    from buswitness.decode.tables import Columns
    monkeypatch.setattr(fig, "SLOW_KEEP", 5)

    def block(t0_s: float, times_ms: list) -> Columns:
        n = len(times_ms)
        t_req = (np.arange(n, dtype=np.int64) * 1_000_000_000 + int(t0_s * 1e9))
        rt = np.array(times_ms, np.float64)
        return Columns({"t_request_end_ns": t_req, "t_response_start_ns": t_req + (rt * 1e6).astype(np.int64),
                        "station": np.full(n, 7, np.int64), "function": np.full(n, 3, np.int64),
                        "outcome": np.full(n, OUTCOMES.index("ok"), np.int64),
                        "exception_code": np.zeros(n, np.int64), "retry": np.zeros(n, bool),
                        "response_ms": rt, "response_ms_low": rt, "response_ms_high": rt,
                        "request_raw": [b"\x07\x03\x00\x00\x00\x01\x84\x6c"] * n,
                        "response_raw": [b"\x07\x03\x02\x00\x00\x00\x00"] * n})

    acc = fig.Accumulator(t0_ns=0, char_ns=1e6)
    acc.add_transactions(block(0.0, [100.0] * 5))          # the bad hour fills the list
    acc.add_transactions(block(10.0, [60.0] * 10 + [5.0]))  # over a 50 ms timeout, below the list
    figures = acc.figures()
    figures.judge(50.0)
    late, ok = OUTCOMES.index("late"), OUTCOMES.index("ok")
    assert int(figures.outcomes[7, late]) == 15
    assert int(figures.outcomes[7, ok]) == 1
