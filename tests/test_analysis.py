"""Per-station figures from decoder-shaped tables: counts, quantiles, timeout inference, station map.

Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

from __future__ import annotations

import numpy as np
import pytest
from buswitness.analysis.figures import Accumulator, Figures
from buswitness.analysis.histogram import FINE, quantile
from buswitness.analysis.pipeline import AnalysisOptions, analyze_tables
from buswitness.analysis.stationmap import load_station_map
from buswitness.analysis.timeout import infer_timeout
from buswitness.errors import InputFileError
from test_analysis_support import CHAR_NS, T0, Tx, header, night, tables


def test_counts_per_station_equal_the_outcomes_fed_in():
    txs = [Tx(1.0, 3, "ok", 10.0), Tx(1.5, 3, "timeout"), Tx(2.5, 3, "late", 250.0), Tx(3.0, 3, "exception", 12.0,
           exception_code=2), Tx(3.5, 3, "corrupt", 11.0), Tx(4.0, 3, "timeout", retry=True), Tx(4.5, 0, "broadcast")]
    out = tables(txs, events=[(1.6, "crc_error", 3, b"\x03\x03\x00"), (2.0, "collision", 3, b"\x03\x03"),
                              (2.1, "stray_bytes", -1, b"\x00")])
    result = analyze_tables(header(), [out])
    s = result.station(3)
    assert (s.requests, s.ok, s.timeouts, s.late, s.exceptions, s.corrupt, s.retries) == (6, 1, 2, 1, 1, 1, 1)
    assert s.answered == 2 and s.exceptions_by_code == {2: 1}
    assert (s.crc_errors, s.collisions) == (1, 1)
    assert result.bus.broadcasts == 1 and result.bus.unattributed_events == {"stray_bytes": 1}
    assert [st.address for st in result.stations] == [3]


def test_quantiles_match_numpy_within_the_histogram_resolution():
    rng = np.random.default_rng(4)
    values = rng.lognormal(3.0, 0.6, 20_000)
    counts = np.bincount(FINE.index(values), minlength=FINE.count)
    for q in (0.5, 0.95, 0.99):
        exact = float(np.quantile(values, q, method="inverted_cdf"))
        assert quantile(counts, q, FINE) == pytest.approx(exact, rel=FINE.relative_resolution * 1.01)


def test_quantile_interval_contains_the_true_value_when_every_sample_is_inside_its_interval():
    rng = np.random.default_rng(5)
    truth = rng.uniform(20, 60, 3000)
    measured = truth + rng.uniform(-2, 2, truth.size)
    txs = [Tx(0.2 * i, 5, "ok", float(m), halfwidth_ms=2.0) for i, m in enumerate(measured)]
    s = analyze_tables(header(), [tables(txs)]).station(5)
    for name, q in (("p50", 0.5), ("p95", 0.95), ("p99", 0.99)):
        lo, hi = s.response_ms_interval[name]
        assert lo <= float(np.quantile(truth, q, method="inverted_cdf")) <= hi
    assert s.response_ms["min"] == pytest.approx(measured.min(), abs=1e-3)
    assert s.response_ms["max"] == pytest.approx(measured.max(), abs=1e-3)
    assert s.timing_halfwidth_ms == pytest.approx(2.0, rel=0.01)


def test_block_size_does_not_change_any_figure():
    outs = night(minutes=6)
    a = analyze_tables(header(), outs, AnalysisOptions(block_rows=500))
    b = analyze_tables(header(), outs, AnalysisOptions(block_rows=10**9))
    assert [s.to_dict() for s in a.stations] == [s.to_dict() for s in b.stations]
    assert a.bus.to_dict() == b.bus.to_dict()


def test_accumulators_of_two_halves_merge_into_the_whole():
    outs = night(minutes=6)
    whole = Accumulator(T0, CHAR_NS)
    first, second = Accumulator(T0, CHAR_NS), Accumulator(T0, CHAR_NS)
    for i, o in enumerate(outs):
        for acc in (whole, first if i < len(outs) // 2 else second):
            acc.add_frames(o.frames)
            acc.add_transactions(o.transactions)
            acc.add_events(o.events)
    merged, whole = Figures.merge([first.figures(), second.figures()]), whole.figures()
    assert (merged.outcomes == whole.outcomes).all() and (merged.rt_mid == whole.rt_mid).all()
    assert merged.station_minutes[7].tolist() == whole.station_minutes[7].tolist()


def test_master_timeout_is_inferred_from_the_silence_after_unanswered_requests():
    result = analyze_tables(header(), night(minutes=10, timeout_ms=200.0))
    t = result.timeout
    assert t.source == "inferred" and t.timeout_ms == 200.0 and t.samples > 50
    assert 200.0 <= t.silence_p5_ms <= 230.0


def test_timeout_is_not_inferable_without_unanswered_requests():
    t = infer_timeout(np.zeros(FINE.count, np.int64))
    assert t.timeout_ms is None and t.source == "not inferable" and "--timeout" in t.explanation


def test_given_timeout_counts_answers_over_it():
    txs = [Tx(1.0 + i, 4, "ok", rt) for i, rt in enumerate((50.0, 150.0, 210.0, 320.0))]
    result = analyze_tables(header(), [tables(txs)], AnalysisOptions(timeout_ms=200.0))
    assert result.timeout.source == "given" and result.station(4).answers_over_timeout == 2


def test_poll_cycle_is_the_interval_between_requests_to_one_station():
    txs = [Tx(0.5 * i, 2, "ok", 10.0) for i in range(100)]
    assert analyze_tables(header(), [tables(txs)]).station(2).poll_cycle_ms["p50"] == pytest.approx(500, rel=0.01)


def test_per_minute_series_places_timeouts_in_their_minute():
    txs = [Tx(30.0, 6, "ok", 10.0), Tx(130.0, 6, "timeout"), Tx(131.0, 6, "timeout")]
    series = analyze_tables(header(), [tables(txs)]).station_series(6)
    assert series["timeout"] == [0, 0, 2] and series["requests"] == [1, 0, 2]


def test_station_map_gives_labels_and_positions(tmp_path):
    p = tmp_path / "stations.toml"
    p.write_text('[stations.7]\nname = "Pump drive B"\nposition_m = 310\nnotes = "far end"\n')
    smap = load_station_map(p)
    assert smap.label(7) == "Pump drive B (7)" and smap.label(3) == "station 3"
    result = analyze_tables(header(), [tables([Tx(1.0, 7, "ok", 12.0)])], AnalysisOptions(station_map=smap))
    assert result.station(7).label == "Pump drive B (7)" and result.station(7).position_m == 310.0


def test_station_map_error_names_file_and_line(tmp_path):
    p = tmp_path / "stations.toml"
    p.write_text('[stations.3]\nname = "ok"\n\n[stations.7]\nname = "Pump"\ncolour = "red"\n')
    with pytest.raises(InputFileError, match=r"stations\.toml: \[stations\.7\] \(line 4\): unknown key\(s\) colour"):
        load_station_map(p)


def test_station_map_that_is_not_toml_is_a_clear_error(tmp_path):
    p = tmp_path / "stations.toml"
    p.write_text("[stations.7\nname = 1\n")
    with pytest.raises(InputFileError, match="is not valid TOML.*line 1"):
        load_station_map(p)


def test_late_answers_are_all_listed_with_their_frames():
    txs = [Tx(1.0 + i, 8, "late", 230.0 + i) for i in range(30)]
    result = analyze_tables(header(), [tables(txs)])
    late = result.late_answers(8)
    assert len(late) == 30 == result.station(8).late
    assert late[0]["response_hex"].startswith("08 03 04") and late[0]["utc"].startswith("2026-03-04T21:00:01")


def test_empty_capture_gives_empty_figures():
    result = analyze_tables(header(), [])
    assert result.stations == [] and result.bus.frames == 0 and result.timeout.source == "not inferable"


def test_timeout_inference_ignores_early_give_ups_and_one_odd_slow_answer():
    move_on = np.bincount(FINE.index(np.array([20.0] * 10 + [204.0, 205.0, 206.0] * 4 + [700.0] * 30)),
                          minlength=FINE.count)
    accepted = np.bincount(FINE.index(np.array(list(np.linspace(5, 60, 5000)) + [248.0])), minlength=FINE.count)
    t = infer_timeout(move_on, accepted)
    assert t.timeout_ms == 200.0 and 203.0 <= t.silence_p5_ms <= 206.0
    assert "10 shorter silences" in t.explanation


def test_stray_addresses_from_noise_are_not_stations():
    txs = [Tx(1.0 + i, 5, "ok", 9.0) for i in range(5)] + [Tx(10.0, 84, "timeout")]
    result = analyze_tables(header(), [tables(txs)])
    assert [s.address for s in result.stations] == [5] and result.bus.stray_addresses == {84: 1}
