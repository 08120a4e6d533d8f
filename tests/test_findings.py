"""Each findings rule on small hand-built figures, with its threshold edges pinned."""

from __future__ import annotations

import json
from dataclasses import fields
from pathlib import Path

import pytest
from buswitness.analysis.finding import SEVERITIES, WIRING_CAUTION
from buswitness.analysis.findings import RULES, SUPERSEDES, evaluate
from buswitness.analysis.pipeline import AnalysisOptions, analyze_tables
from buswitness.analysis.rules import (
    absence,
    duplicate,
    exception_codes,
    lateness,
    layout,
    line,
    load,
    thresholds,
    timing,
)
from buswitness.analysis.rules.lateness import suggested_timeout_ms
from buswitness.analysis.rules.thresholds import Thresholds
from buswitness.analysis.stationmap import StationInfo, StationMap
from test_analysis_support import Tx, header, tables

TH = Thresholds()
DOCS = Path(__file__).resolve().parents[1] / "docs" / "findings.md"


def polls(seconds: float, stations=(1, 2, 3), period_s: float = 0.5, rt_ms: float = 10.0, fate=None) -> list[Tx]:
    """Each station polled once per period; ``fate(station, k, t)`` may return (outcome, response_ms)."""
    txs, k, t = [], 0, 0.1
    while t < seconds:
        for i, st in enumerate(stations):
            when = t + i * period_s / (len(stations) + 1)
            outcome, rt = (fate(st, k, when) if fate else None) or ("ok", rt_ms + st)
            txs.append(Tx(when, st, outcome, rt))
        k += 1
        t += period_s
    return txs


def result_of(txs, events=(), timeout_ms: float | None = 200.0, smap: StationMap | None = None):
    return analyze_tables(header(), [tables(txs, list(events))],
                          AnalysisOptions(timeout_ms=timeout_ms, station_map=smap))


def rules_of(findings) -> list[str]:
    return [f.rule for f in findings]


# -- late answers ---------------------------------------------------------------------------------------

def _late_fate(station: int, share_every: int, late_ms: float = 260.0):
    def fate(st, k, t):
        if st == station and k % share_every == 0:
            return ("late", late_ms + (k % 7) * 20)
        return None
    return fate


def test_station_answering_after_the_timeout_is_slow_and_gets_a_suggested_timeout():
    r = result_of(polls(600, fate=_late_fate(3, 50)))  # 2% of station 3's polls late, up to 380 ms
    (f,) = lateness.late_answers(r, TH)
    assert (f.rule, f.station, f.severity) == ("late-answers", 3, "warning")
    assert "slow, not the wire" in f.statement and "200 ms master timeout (given)" in f.statement
    # slowest 380 ms x 1.25 margin = 475 ms, rounded up to the next usual setting (common practice)
    assert f.evidence["suggested_timeout_ms"] == 500.0
    assert f.examples and f.examples[0]["outcome"] == "late" and f.examples[0]["request_hex"]


def test_late_share_under_one_percent_is_a_notice_and_over_is_a_warning():
    below = result_of(polls(600, fate=_late_fate(3, 125)))   # 0.8%
    above = result_of(polls(600, fate=_late_fate(3, 90)))    # 1.1%
    assert lateness.late_answers(below, TH)[0].severity == "notice"
    assert lateness.late_answers(above, TH)[0].severity == "warning"


def test_answers_over_the_timeout_before_the_master_moved_on_are_late_too():
    # issue 12: one meaning of timeout. The decoder saw no next request before these 240 ms answers;
    # judged against the 200 ms timeout in use they are late, given or inferred alike.
    r = result_of(polls(300, fate=lambda st, k, t: ("ok", 240.0) if st == 3 and k % 20 == 0 else None))
    (f,) = lateness.late_answers(r, TH)
    s = r.station(3)
    assert s.late == 30 and s.ok == s.requests - 30 and "30 late answers" in f.statement
    assert len(r.late_answers(3)) == 30


def test_fewer_late_answers_than_the_minimum_make_no_late_finding():
    txs = polls(60)
    txs[3].outcome, txs[3].response_ms = "late", 250.0
    txs[9].outcome, txs[9].response_ms = "late", 260.0
    assert lateness.late_answers(result_of(txs), TH) == []


def test_failures_confined_to_the_second_half_are_said_to_start_there():
    fate = _late_fate(3, 10)
    r = result_of(polls(600, fate=lambda st, k, t: fate(st, k, t) if t > 300 else None))
    (f,) = lateness.late_answers(r, TH)
    assert f.t_start_s == 300.0 and "all after 21:05 UTC" in f.statement


def test_failures_across_the_whole_capture_but_its_last_minutes_keep_to_no_period():
    fate = _late_fate(3, 10)
    r = result_of(polls(3000, fate=lambda st, k, t: fate(st, k, t) if t < 2880 else None))
    (f,) = lateness.late_answers(r, TH)
    assert "all between" not in f.statement and "all after" not in f.statement


def test_suggested_timeout_rounds_up_to_the_next_usual_step():
    r = result_of(polls(60, rt_ms=140.0))  # slowest answer 143 ms; x 1.25 = 179 ms
    assert suggested_timeout_ms(r, r.station(3), TH) == 200.0


def test_slow_answers_close_to_the_timeout_are_a_headroom_notice():
    r = result_of(polls(120, rt_ms=165.0))  # p99 168 ms = 84% of 200 ms, over the 80% edge
    found = lateness.timeout_headroom(r, TH)
    assert {f.station for f in found} == {1, 2, 3} and found[0].severity == "notice"
    assert lateness.timeout_headroom(r, Thresholds(headroom_share=0.9)) == []


def test_late_answers_that_overlap_the_next_poll_explain_damaged_answers_elsewhere():
    fate = _late_fate(3, 20)

    def with_damage(st, k, t):
        if st == 1 and k % 20 == 0:
            return ("corrupt", 12.0)
        return fate(st, k, t)
    r = result_of(polls(300, fate=with_damage))
    (f,) = lateness.late_collisions(r, TH)
    assert f.station == 3 and "not line noise" in f.statement
    assert f.evidence["damaged_answers_other_stations"] == r.station(1).corrupt
    assert line.errors_bus_wide(r, TH) == []  # the late station's answers account for the damage


def test_polls_lost_now_and_then_without_slowness_are_missed_polls():
    r = result_of(polls(600, fate=lambda st, k, t: ("timeout", float("nan")) if st == 2 and k % 40 == 0 else None))
    (f,) = lateness.missed_polls(r, TH)
    assert (f.station, f.severity) == (2, "warning") and f.caution == WIRING_CAUTION
    assert lateness.late_answers(r, TH) == []


# -- absent and silent ----------------------------------------------------------------------------------

def test_polled_station_that_never_answers_is_never_present():
    r = result_of(polls(120, stations=(1, 2, 4), fate=lambda st, k, t: ("timeout", float("nan")) if st == 4 else None))
    (f,) = absence.never_present(r, TH)
    assert (f.rule, f.station, f.severity) == ("never-present", 4, "critical")
    assert f.causes[0].cause.startswith("The device is not connected")
    assert f.caution == WIRING_CAUTION


def test_answers_from_an_address_nobody_polls_put_the_address_setting_first():
    r = result_of(polls(120, stations=(1, 2, 4), fate=lambda st, k, t: ("timeout", float("nan")) if st == 4 else None),
                  events=[(10.0 + i, "orphan_response", 14, b"\x0e\x03\x00") for i in range(3)])
    (f,) = absence.never_present(r, TH)
    assert "address setting" in f.causes[0].cause and "14" in f.causes[0].cause


def test_no_station_answering_is_one_bus_finding_not_one_per_station():
    r = result_of(polls(120, fate=lambda st, k, t: ("timeout", float("nan"))))
    found = evaluate(r)
    assert found[0].rule == "no-answers" and found[0].severity == "critical"
    assert "swapped" in found[0].causes[0].cause and found[0].caution == WIRING_CAUTION
    assert "never-present" not in rules_of(found)


def test_silence_in_the_middle_is_placed_within_a_poll_or_two_of_its_edges():
    fate = lambda st, k, t: ("timeout", float("nan")) if st == 2 and 150 <= t < 330 else None
    r = result_of(polls(480, fate=fate))
    (f,) = absence.silent_period(r, TH)
    assert f.station == 2 and f.severity == "warning" and f.evidence["came_back"]
    assert f.t_start_s == pytest.approx(150, abs=1.0) and f.t_end_s == pytest.approx(330, abs=1.0)
    assert "then answered again" in f.statement
    assert absence.silent_period(r, Thresholds(silent_critical_s=170))[0].severity == "critical"


def test_station_silent_until_the_end_is_said_not_to_have_come_back():
    r = result_of(polls(300, fate=lambda st, k, t: ("timeout", float("nan")) if st == 2 and t >= 120 else None))
    (f,) = absence.silent_period(r, TH)
    assert not f.evidence["came_back"] and "by the end of the capture" in f.statement


def test_minute_with_a_few_answers_is_not_silent_above_the_dark_share():
    # one poll in ten answered (10%) stays above the 5% dark share for that minute
    fate = lambda st, k, t: ("timeout", float("nan")) if st == 2 and 120 <= t < 240 and k % 10 else None
    r = result_of(polls(360, fate=fate))
    assert absence.silent_period(r, TH) == []
    assert absence.silent_period(r, Thresholds(silent_dark_share=0.15))


# -- the line -------------------------------------------------------------------------------------------

def _corrupt_every(rates: dict):
    return lambda st, k, t: ("corrupt", 12.0) if st in rates and k % rates[st] == 0 else None


def test_line_the_sniffer_cannot_read_is_critical_and_swapped_wires_come_first_with_breaks():
    txs = polls(5, stations=(1,))
    junk = [(0.2 + 0.01 * i, "line_error", -1, bytes(8)) for i in range(300)]
    breaks = [(0.205 + 0.05 * i, "break", -1, b"\x00") for i in range(40)]
    settings_first = line.unreadable_line(result_of(txs, junk), TH)
    polarity_first = line.unreadable_line(result_of(txs, junk + breaks), TH)
    assert settings_first[0].severity == "critical" and "wrong settings" in settings_first[0].causes[0].cause
    assert "A and B wires are swapped" in polarity_first[0].causes[0].cause
    assert line.unreadable_line(result_of(polls(60)), TH) == []


def test_parity_errors_on_frames_with_good_crcs_mean_the_sniffers_format_is_wrong():
    txs = polls(120)
    marks = [(t.t_s + 0.001, "line_error", -1, b"\x00") for t in txs[::5]]  # one frame in ten
    turn = [(t.t_s + 0.002, "turnaround_short", 1, b"\x01\x03") for t in txs[::3][:30]]
    found = evaluate(result_of(txs, marks + turn))
    assert found[0].rule == "sniffer-format" and "8E1" in found[0].causes[0].cause
    assert "turnaround-short" not in rules_of(found)  # byte times are wrong, so is that finding
    fewer = [(t.t_s + 0.001, "line_error", -1, b"\x00") for t in txs[::25]]  # one frame in fifty
    assert line.sniffer_format(result_of(txs, fewer), TH) == []


def test_damage_on_every_station_alike_is_bus_wide():
    r = result_of(polls(600, fate=_corrupt_every({1: 50, 2: 50, 3: 50})))  # 2% each
    (f,) = line.errors_bus_wide(r, TH)
    assert f.severity == "warning" and f.station is None and f.caution == WIRING_CAUTION
    quiet = result_of(polls(600, fate=_corrupt_every({1: 800, 2: 800, 3: 800})))  # 0.1% each, under 0.2%
    assert line.errors_bus_wide(quiet, TH) == []


def test_damage_rising_with_position_points_at_termination_and_length():
    smap = StationMap({1: StationInfo(1, "Near", 20), 2: StationInfo(2, "Middle", 400), 3: StationInfo(3, "Far", 1100)})
    r = result_of(polls(600, fate=_corrupt_every({3: 20, 1: 900})), smap=smap)
    (f,) = line.far_station_errors(r, TH)
    assert (f.station, f.severity) == (3, "warning") and "Termination missing" in f.causes[0].cause
    assert any("1000 m" in c.cause for c in f.causes)  # MSL §3.4.3: 1000 m with AWG26
    assert rules_of(evaluate(r)).count("station-errors") == 0  # the far finding explains it
    no_map = result_of(polls(600, fate=_corrupt_every({3: 20, 1: 900})))
    assert line.far_station_errors(no_map, TH) == [] and line.station_errors(no_map, TH)[0].station == 3


def test_far_station_needs_three_times_the_near_share():
    smap = StationMap({1: StationInfo(1, "Near", 20), 2: StationInfo(2, "Middle", 400), 3: StationInfo(3, "Far", 900)})
    r = result_of(polls(1200, fate=_corrupt_every({1: 100, 3: 40})), smap=smap)  # 1% near, 2.5% far: x2.5
    assert line.far_station_errors(r, TH) == []
    assert line.far_station_errors(r, Thresholds(far_ratio=2.0))


def test_errors_in_a_few_minutes_are_clustered_with_their_times():
    events = [(m * 60 + 5 + i * 0.1, "line_error", -1, b"\x55") for m in (2, 6) for i in range(30)]
    r = result_of(polls(600), events)
    (f,) = line.errors_clustered(r, TH)
    assert (f.t_start_s, f.t_end_s) == (120.0, 420.0)
    assert [b["t_start_s"] for b in f.evidence["bursts"]] == [120.0, 360.0]
    spread = [(6 + 10 * i, "line_error", -1, b"\x55") for i in range(58)]
    assert line.errors_clustered(result_of(polls(600), spread), TH) == []


def test_a_burst_over_a_steady_error_rate_is_reported_apart():
    steady = [(1.0 + 2.0 * i, "crc_error", 3, b"\x03\x03\x00\x00\x00") for i in range(300)]  # 30 a minute
    burst = [(425.0 + 0.05 * i, "line_error", -1, b"\x55") for i in range(200)]
    r = result_of(polls(600), steady + burst)
    assert line.errors_clustered(r, TH) == []
    (f,) = line.error_bursts(r, TH)
    assert (f.severity, f.t_start_s, f.t_end_s) == ("notice", 420.0, 480.0) and "steady error rate" in f.statement


def test_stray_bytes_between_intact_frames_point_at_bias():
    txs = polls(300)
    stray = [(1.0 + 2.0 * i, "stray_bytes", -1, b"\x00") for i in range(60)]  # 60 in 3600 frames: 1.7%
    (f,) = line.idle_stray_bytes(result_of(txs, stray), TH)
    assert f.severity == "warning" and "bias" in f.statement and "MSL §3.4.6" in f.causes[0].cause
    crcs = [(1.5 + 2.0 * i, "crc_error", 2, b"\x02\x03\x00\x00\x00") for i in range(40)]
    assert line.idle_stray_bytes(result_of(txs, stray + crcs), TH) == []


def _idle_after(txs, every: int = 1):
    """An idle-line byte behind every ``every``-th request (the master's, station -1) and answer."""
    out = []
    for t in txs[::every]:
        out.append((t.t_s + 0.0006, "idle_line_byte", -1, b"\x00"))
        out.append((t.t_s + 0.0006 + (t.response_ms + 5.0) / 1e3, "idle_line_byte", t.station, b"\xfe"))
    return out


def test_bytes_behind_most_frames_mean_the_line_is_not_held_idle():
    txs = polls(120)  # 720 polls, 1440 frames
    r = result_of(txs, _idle_after(txs))
    (f,) = line.line_not_held_idle(r, TH)
    assert f.severity == "warning" and "not held idle" in f.statement
    assert "fail-safe bias / termination" in f.statement and f.caution == WIRING_CAUTION
    assert f.evidence["by_talker"] == {"master": 720, "1": 240, "2": 240, "3": 240}
    assert "MSL §3.4.6" in f.causes[0].cause
    assert {"line-not-held-idle"} <= set(rules_of(evaluate(r)))
    # the edge: half the frames (IDLE_BYTES_PER_FRAME) and no fewer
    assert line.line_not_held_idle(result_of(txs, _idle_after(txs, 2)), TH)  # 0.5 per frame
    assert line.line_not_held_idle(result_of(txs, _idle_after(txs, 3)), TH) == []  # 0.33 per frame


def test_idle_line_bytes_are_no_evidence_of_the_sniffers_format_nor_damage():
    txs = polls(120)
    found = rules_of(evaluate(result_of(txs, _idle_after(txs))))
    assert "sniffer-format" not in found and "unreadable-line" not in found and "errors-bus-wide" not in found
    # real marks inside frames still make the format finding, beside the bias one
    marks = [(t.t_s + 0.001, "line_error", -1, b"\x03") for t in txs[::5]]
    found = rules_of(evaluate(result_of(txs, _idle_after(txs) + marks)))
    assert "sniffer-format" in found and "line-not-held-idle" in found


def test_one_address_garbled_with_framing_errors_is_a_duplicate_address():
    fate = _corrupt_every({3: 2})  # half of station 3's answers
    fights = [(0.1 + 1.0 * i, "line_error", 3, b"\x03\xff") for i in range(150)]
    r = result_of(polls(300, fate=fate), fights)
    (f,) = duplicate.duplicate_address(r, TH)
    assert (f.station, f.severity) == (3, "critical") and "second device" in f.causes[0].cause
    found = evaluate(r)
    assert found[0].rule == "duplicate-address" and "station-errors" not in rules_of(found)
    assert duplicate.duplicate_address(result_of(polls(300, fate=fate)), TH) == []  # no fighting drivers


def test_a_second_valid_answer_to_most_polls_is_a_duplicate_address_too():
    seconds = [(0.1 + 0.5 * k + 0.05, "orphan_response", 2, b"\x02\x03\x00") for k in range(0, 600, 2)]  # 50%
    (f,) = duplicate.duplicate_address(result_of(polls(300), seconds), TH)
    assert f.station == 2 and "came when none was awaited" in f.statement
    few = seconds[::20]  # 2.5% of its polls: what a slow device's late answers leave
    assert duplicate.duplicate_address(result_of(polls(300), few), TH) == []


# -- timing -----------------------------------------------------------------------------------------------

def test_answers_certainly_under_t35_are_a_turnaround_violation():
    events = [(0.1 + 0.5 * k, "turnaround_short", 1, b"\x01\x03") for k in range(20)]
    r = result_of(polls(300), events)
    (f,) = timing.turnaround_short(r, TH)
    assert f.station == 1 and "2.005 ms" in f.statement  # t3.5 at 19200 8E1: 3.5 x 11 bits (MSL p13; calc)


def test_very_fast_answers_with_coarse_timestamps_are_not_observable():
    txs = polls(120, stations=(1, 2), fate=lambda st, k, t: ("ok", 1.5) if st == 1 else None)
    for t in txs:
        t.halfwidth_ms = 4.0
    r = result_of(txs)
    (f,) = timing.possible_short_turnaround(r, TH)
    assert f.station == 1 and f.severity == "notice" and "not observable at this adapter latency" in f.statement
    assert timing.timing_not_observable(r, TH)[0].severity == "info"


def test_gaps_inside_one_stations_frames_are_reported_above_the_others():
    gaps = [(0.2 + 0.5 * k, "gap_in_frame", 2, b"\x02\x03") for k in range(0, 600, 10)]  # 10% of its polls
    background = [(0.3 + 0.5 * k, "gap_in_frame", s, b"\x01") for s in (1, 3) for k in range(0, 600, 100)]
    (f,) = timing.gap_in_frame(result_of(polls(300), gaps + background), TH)
    assert f.station == 2 and "t1.5 = 0.859 ms" in f.statement  # t1.5 at 19200: 1.5 x 11 bits (calc)
    even = [(0.3 + 0.5 * k, "gap_in_frame", s, b"\x01") for s in (1, 2, 3) for k in range(0, 600, 10)]
    assert timing.gap_in_frame(result_of(polls(300), even), TH) == []


# -- exceptions and load --------------------------------------------------------------------------------

def _exceptions(every_n: int):
    return lambda st, k, t: ("exception", 11.0) if st == 2 and k % every_n == 0 else None


def test_exceptions_are_named_by_code_and_02_means_a_register_map_mismatch():
    r = analyze_tables(header(), [tables([Tx(t.t_s, t.station, t.outcome, t.response_ms,
                                             exception_code=2 if t.outcome == "exception" else 0)
                                          for t in polls(300, fate=_exceptions(50))])],
                       AnalysisOptions(timeout_ms=200))
    (f,) = exception_codes.exceptions(r, TH)
    assert f.severity == "warning" and "code 02 illegal data address" in f.statement  # MAP p48
    assert "register map" in f.causes[0].cause


@pytest.mark.parametrize(("code", "every_n", "severity"), [(6, 250, "notice"), (4, 250, "warning"), (6, 90, "warning")])
def test_exception_severity_follows_rate_and_device_fault_codes(code, every_n, severity):
    txs = [Tx(t.t_s, t.station, t.outcome, t.response_ms, exception_code=code if t.outcome == "exception" else 0)
           for t in polls(600, fate=_exceptions(every_n))]
    (f,) = exception_codes.exceptions(analyze_tables(header(), [tables(txs)], AnalysisOptions(timeout_ms=200)), TH)
    assert f.severity == severity


def test_bus_load_is_information_with_the_room_left_in_the_cycle():
    (f,) = load.bus_load(result_of(polls(300)), TH)
    assert f.severity == "info" and f.evidence["spare_stations"] > 0 and "more station" in f.statement
    assert load.bus_load(result_of(polls(300)), Thresholds(load_notice_utilisation=0.0))[0].severity == "notice"


def test_more_devices_than_a_biased_segment_takes_is_a_notice():
    # MSL §3.4.1: 32 devices per segment; §3.4.6: Modbus bias lowers that by 4
    crowded = result_of(polls(60, stations=tuple(range(1, 28)), period_s=2.0))  # 27 + master + sniffer = 29
    (f,) = layout.device_count(crowded, TH)
    assert f.evidence["devices"] == 29 and f.severity == "notice"
    assert layout.device_count(result_of(polls(60, stations=tuple(range(1, 27)), period_s=2.0)), TH) == []


def test_station_map_beyond_1000_m_is_a_cable_length_notice():
    smap = StationMap({1: StationInfo(1, "Near", 20), 3: StationInfo(3, "Far", 1250)})
    (f,) = layout.cable_length(result_of(polls(60), smap=smap), TH)
    assert f.station == 3 and "MSL §3.4.3" in f.statement
    smap = StationMap({1: StationInfo(1, "Near", 20), 3: StationInfo(3, "Far", 1000)})
    assert layout.cable_length(result_of(polls(60), smap=smap), TH) == []


# -- the engine -------------------------------------------------------------------------------------------

def test_evaluate_ranks_by_severity_and_keeps_one_finding_per_rule_and_station():
    fate = _late_fate(3, 20)
    r = result_of(polls(600, fate=lambda st, k, t: fate(st, k, t) or (("exception", 11.0) if st == 2 and k % 30 == 0
                                                                        else None)))
    found = evaluate(r)
    ranks = [SEVERITIES.index(f.severity) for f in found]
    assert ranks == sorted(ranks)
    assert len({(f.rule, f.station) for f in found}) == len(found)
    json.dumps([f.to_dict() for f in found], allow_nan=False)


def test_clean_traffic_gives_nothing_above_information():
    assert {f.severity for f in evaluate(result_of(polls(600)))} <= {"info"}


def test_every_wiring_finding_carries_the_caution():
    wiring = {"no-traffic", "no-valid-frames", "unreadable-line", "no-answers", "never-present", "silent-period", "duplicate-address",
              "errors-clustered", "far-station-errors", "station-errors", "errors-bus-wide", "idle-stray-bytes",
              "line-not-held-idle", "missed-polls", "device-count", "cable-length"}
    assert "not a measurement of the wire" in WIRING_CAUTION
    cases = [result_of(polls(300, fate=_corrupt_every({1: 50, 2: 50, 3: 50}))),
             result_of(polls(120, fate=lambda st, k, t: ("timeout", float("nan")))),
             result_of(polls(300, fate=lambda st, k, t: ("timeout", float("nan")) if st == 2 and t > 100 else None))]
    seen = [f for r in cases for f in evaluate(r)]
    assert {f.rule for f in seen} & wiring
    for f in seen:
        assert (f.caution == WIRING_CAUTION) == (f.rule in wiring), f.rule


def test_superseding_rules_name_only_known_rules():
    for strong, weak in SUPERSEDES.items():
        assert strong in RULES and weak <= set(RULES)


def test_every_threshold_is_a_named_constant_with_its_default():
    for f in fields(Thresholds):
        assert getattr(thresholds, f.name.upper()) == f.default


def test_every_rule_and_threshold_is_documented():
    text = DOCS.read_text(encoding="utf-8")
    for rule in RULES:
        assert f"`{rule}`" in text, rule
    for f in fields(Thresholds):
        assert f.name.upper() in text, f.name


def test_burst_hidden_under_a_duplicate_addresses_damage_is_found_on_the_other_stations():
    def fate(st, k, t):
        if st == 3 and k % 2 == 0:
            return ("corrupt", 12.0)  # a chronic fault on one address, every minute alike
        if st in (1, 2) and 240 <= t < 250:
            return ("corrupt", 12.0)  # ten seconds of noise at 4 min
        return None
    fights = [(0.1 + 1.0 * i, "line_error", 3, b"\x03\xff") for i in range(600)]
    r = result_of(polls(600, fate=fate), fights)
    found = line.errors_clustered(r, TH)
    assert [(f.t_start_s, f.t_end_s) for f in found] == [(240.0, 300.0)]
    assert found[0].evidence["counted"] == "damaged answers"


def test_an_empty_capture_has_only_the_no_traffic_finding():
    assert rules_of(evaluate(analyze_tables(header(), []))) == ["no-traffic"]


def test_answers_at_twice_t35_are_not_suspected_of_a_short_turnaround():
    txs = polls(120, stations=(1, 2), fate=lambda st, k, t: ("ok", 4.0) if st == 1 else None)  # 2 x t3.5 = 4.01 ms
    for t in txs:
        t.halfwidth_ms = 4.0
    assert timing.possible_short_turnaround(result_of(txs), TH) == []


# -- a capture with nothing to analyse -------------------------------------------------------------------

def test_a_capture_without_one_byte_is_a_critical_no_traffic_finding_not_a_clean_bill():
    found = evaluate(result_of([]))
    assert [(f.rule, f.severity) for f in found] == [("no-traffic", "critical")]
    (f,) = found
    assert f.statement.startswith("No traffic") and "not a healthy bus" in f.statement
    causes = " ".join(c.cause + " " + c.check for c in f.causes)
    assert "not on the bus" in causes and "A and B" in causes and "buswitness detect" in causes
    assert f.caution == WIRING_CAUTION


def test_bytes_that_never_form_a_frame_are_a_critical_no_valid_frames_finding():
    garbage = [(0.1 + 0.5 * i, "crc_error", 0, b"\x12\x34\x56") for i in range(2)]  # under MIN_EVENTS
    found = evaluate(result_of([], garbage))
    assert [(f.rule, f.severity) for f in found] == [("no-valid-frames", "critical")]
    assert "buswitness detect" in found[0].causes[0].check


def test_a_line_full_of_garbage_is_the_unreadable_line_finding_alone_and_it_points_to_detect():
    garbage = [(0.1 + 0.05 * i, "crc_error", 0, bytes(range(i % 7 + 3))) for i in range(600)]
    found = evaluate(result_of([], garbage))
    assert rules_of(found) == ["unreadable-line"] and found[0].severity == "critical"
    assert any("buswitness detect" in c.check for c in found[0].causes)


def test_traffic_with_valid_frames_raises_neither_silence_finding():
    assert not {"no-traffic", "no-valid-frames"} & set(rules_of(evaluate(result_of(polls(60)))))
