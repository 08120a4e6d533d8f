"""On simulator captures, the figures in summary.json equal the simulator's ground truth.

Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

from __future__ import annotations

import json

import pandas as pd
import pytest
from buswitness.analysis import AnalysisOptions, analyze
from buswitness.analysis.summary import summary_dict
from buswitness.capture.sources import open_capture
from buswitness.decode import Decoder, DecoderConfig
from buswitness.simulate import load_scenario, simulate
from buswitness.simulate.scenario import parse_scenario

COUNTS = ("requests", "answered", "timeouts", "late", "corrupt", "crc_errors", "collisions", "retries")


def scenario(tail: bool) -> dict:
    """A fictional three-station bus: exceptions, a slow drive, a station off the bus for a minute."""
    slow = {"fixed_ms": 40, "jitter_ms": 20}
    if tail:
        slow.update(tail_rate=0.05, tail_mean_ms=180)
    return {
        "name": "truthcheck", "description": "three stations, one slow, one off the bus for a minute",
        "start_utc": "2026-11-30T22:00:00+00:00", "duration_s": 600,
        "bus": {"baud": 19200, "format": "8E1", "noise_ber_per_km": 0}, "adapter": {"latency_ms": 16},
        "master": {"timeout_ms": 200, "retries": 1, "inter_poll_delay_ms": 5, "cycle_period_ms": 500,
                   "polls": [{"station": 1, "function": 3, "start": 0, "quantity": 6},
                             {"station": 2, "function": 4, "start": 0, "quantity": 4},
                             {"station": 7, "function": 3, "start": 0, "quantity": 8}]},
        "stations": [
            {"address": 1, "name": "Meter one", "position_m": 10, "response": {"fixed_ms": 6, "jitter_ms": 2},
             "exception_rate": 0.01, "exception_codes": [2]},
            {"address": 2, "name": "Meter two", "position_m": 50, "response": {"fixed_ms": 12, "jitter_ms": 4}},
            {"address": 7, "name": "Slow drive", "position_m": 80, "response": slow}],
        "events": [{"kind": "silent", "station": 2, "start_s": 200, "duration_s": 60, "detail": "off the bus"}],
    }


def run(tmp_path, sc, seconds: float = 600):
    sim = simulate(sc, duration_s=seconds, seed=2, keep_tables=False)
    capture = tmp_path / "sim.bwcap"
    sim.write(capture)
    result = analyze(open_capture(capture), AnalysisOptions(progress=False))
    return summary_dict(result), sim.truth


def assert_counts_equal_truth(summary: dict, truth) -> None:
    stations = {s["address"]: s for s in summary["stations"]}
    assert sorted(stations) == sorted(truth.stations)
    for address, t in truth.stations.items():
        s = stations[address]
        assert {k: s[k] for k in COUNTS} == {k: t[k] for k in COUNTS}, f"station {address}"
        assert s["exceptions"] == t["exceptions"]["total"]
        assert {e["code"]: e["count"] for e in s["exceptions_by_code"]} == {
            k: v for k, v in t["exceptions"].items() if k != "total"}


def test_counts_and_percentiles_equal_the_truth_on_a_clean_bus(tmp_path):
    summary, truth = run(tmp_path, parse_scenario(json.dumps(scenario(tail=False)), "test"))
    assert_counts_equal_truth(summary, truth)
    for s in summary["stations"]:
        t = truth.stations[s["address"]]["response_ms"]
        for q in ("p50", "p95", "p99"):
            lo, hi = s["response_ms_interval"][q]
            assert lo <= t[q] <= hi, (s["address"], q, lo, t[q], hi)
    # the simulated master's timeout is 200 ms (scenario above)
    assert summary["timeout"]["source"] == "inferred" and summary["timeout"]["timeout_ms"] == 200.0


@pytest.mark.xfail(reason="where a late answer collides, the sniffer sees one damaged run for two overlapping "
                          "frames, and a request garbled by a late answer is invisible: on this bus 7 of the 9 "
                          "collisions of the slow station, 5 of its 9 CRC failures and all but one of its 1224 "
                          "requests are recovered (run tests/test_analysis_truth.py for the diff)", strict=True)
def test_counts_equal_the_truth_when_late_answers_collide(tmp_path):
    summary, truth = run(tmp_path, parse_scenario(json.dumps(scenario(tail=True)), "test"))
    assert_counts_equal_truth(summary, truth)


def test_summary_counts_equal_the_decoded_tables_on_the_demo_bus(tmp_path):
    sim = simulate(load_scenario("pumpstation"), duration_s=300, seed=4, keep_tables=False)
    capture = tmp_path / "p.bwcap"
    sim.write(capture)
    source = open_capture(capture)
    decoder = Decoder(DecoderConfig.from_header(source.header))
    outs = [decoder.feed_batch(b) for b in source.iter_batches()] + [decoder.flush()]
    tx = pd.concat([o.transactions for o in outs], ignore_index=True)
    ev = pd.concat([o.events for o in outs], ignore_index=True)
    summary = summary_dict(analyze(open_capture(capture), AnalysisOptions(progress=False)))
    for s in summary["stations"]:
        mine = tx[tx["station"] == s["address"]]
        outcomes = mine["outcome"].astype(str).value_counts()
        assert s["requests"] == len(mine)
        assert s["timeouts"] == outcomes.get("timeout", 0) and s["late"] == outcomes.get("late", 0)
        assert s["answered"] == outcomes.get("ok", 0) + outcomes.get("exception", 0)
        crc_failed = ev["kind"].astype(str).isin(["crc_error", "truncated"])
        assert s["crc_errors"] == int((crc_failed & (ev["station"] == s["address"])).sum())
    assert summary["bus"]["requests"] == len(tx)


def test_a_given_timeout_and_the_same_timeout_inferred_give_the_same_counts(tmp_path):
    # issue 12: one meaning of timeout; the decoder records facts, the analysis judges them once
    sim = simulate(parse_scenario(json.dumps(scenario(tail=True)), "test"), duration_s=600, seed=2, keep_tables=False)
    capture = tmp_path / "sim.bwcap"
    sim.write(capture)
    inferred = analyze(open_capture(capture), AnalysisOptions(progress=False))
    assert inferred.timeout.source == "inferred" and inferred.timeout.timeout_ms == 200
    given = analyze(open_capture(capture), AnalysisOptions(progress=False, timeout_ms=200))
    counts = ("requests", "answered", "timeouts", "late", "corrupt", "ambiguous", "retries", "answers_over_timeout")
    for a, b in zip(summary_dict(inferred)["stations"], summary_dict(given)["stations"]):
        assert {k: a[k] for k in counts} == {k: b[k] for k in counts}


def test_the_masters_timeout_is_inferred_as_simulated_when_late_answers_follow_retries(tmp_path):
    # the pump station's slow drive answers after the master's retry; the master takes that late
    # answer and moves on early: those silences must not pull the inferred timeout down
    sim = simulate(load_scenario("pumpstation"), duration_s=1800, seed=4, keep_tables=False)
    capture = tmp_path / "sim.bwcap"
    sim.write(capture)
    result = analyze(open_capture(capture), AnalysisOptions(progress=False))
    assert result.timeout.timeout_ms == load_scenario("pumpstation").master.timeout_ms  # 200 ms
