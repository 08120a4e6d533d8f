"""``watch`` and the rolling per-station counters behind it.

Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

from __future__ import annotations

import math
import re
import subprocess
import sys
import time

import pandas as pd
import pytest
from buswitness.analysis.rolling import LiveDecoder, RollingStations
from buswitness.capture.fileformat import CaptureHeader, CaptureReader, PortInfo
from buswitness.decode.crc import append_crc
from buswitness.decode.timing import SerialFormat
from ptyhelpers import PtyAdapter


def _cells(line: str) -> list[str]:
    """A row of watch's table: columns stand at least two spaces apart (one of padding on each side)."""
    return re.split(r"\s{2,}", line.strip())


def _txns(rows):
    return pd.DataFrame(rows, columns=["station", "outcome", "response_ms"])


def test_requests_answers_and_timeouts_are_counted_per_station():
    figs = RollingStations()
    figs.add_transactions(_txns([
        (7, "ok", 12.0), (7, "timeout", math.nan), (7, "exception", 9.0), (3, "ok", 4.0), (7, "late", 250.0),
        (0, "broadcast", math.nan), (3, "corrupt", math.nan),
    ]))
    by = {s.station: s for s in figs.rows()}
    assert set(by) == {3, 7}  # broadcasts address nobody
    assert (by[7].requests, by[7].answered, by[7].timeouts, by[7].exceptions, by[7].late) == (4, 3, 1, 1, 1)
    assert (by[3].requests, by[3].answered, by[3].corrupt) == (2, 1, 1)
    assert by[7].last_response_ms == 250.0


def test_p95_is_the_nearest_rank_of_the_recent_window():
    figs = RollingStations(window=100)
    figs.add_transactions(_txns([(1, "ok", float(v)) for v in range(1, 201)]))
    # Only the last 100 (101..200) are kept; nearest rank ceil(0.95 * 100) = 95th -> 195.
    assert figs.rows()[0].p95_ms == 195.0
    assert RollingStations().rows() == []


def test_crc_failures_and_line_events_come_from_the_events_table():
    figs = RollingStations()
    figs.add_events(pd.DataFrame({"kind": ["crc_error", "crc_error", "line_error", "crc_error", "port_gap"],
                                  "station": [5, 5, -1, -1, -1]}))
    figs.add_frames(pd.DataFrame({"address": [5, 5, 6]}))
    by = {s.station: s for s in figs.rows()}
    assert by[5].crc_errors == 2 and by[5].frames == 2 and by[6].frames == 1
    assert figs.line_errors == 1 and figs.port_gaps == 1


def test_live_decoder_counts_a_request_and_its_answer():
    header = CaptureHeader.new(SerialFormat.parse("8E1", 19200), [PortInfo(0, "p", latency_ms=1.0)])
    dec = LiveDecoder.create(header)
    if dec is None:
        pytest.skip("the decoder is not in this build")
    req = append_crc(bytes([7, 3, 0, 0, 0, 1]))
    rsp = append_crc(bytes([7, 3, 2, 0, 42]))
    t = header.start_monotonic_ns
    for i in range(5):
        dec.add(0, t + i * 100_000_000, req, 0)
        dec.add(0, t + i * 100_000_000 + 20_000_000, rsp, 0)
    dec.finish()
    st = {s.station: s for s in dec.figures.rows()}[7]
    assert dec.disabled_reason is None
    assert st.requests == 5 and st.answered == 5 and st.timeouts == 0


def test_watch_shows_the_stations_it_hears_and_records_at_the_same_time(tmp_path):
    out = tmp_path / "watched.bwcap"
    req = append_crc(bytes([9, 3, 0, 0, 0, 2]))
    rsp = append_crc(bytes([9, 3, 4, 0, 1, 0, 2]))
    with PtyAdapter(tmp_path / "ttyW") as adapter:
        proc = subprocess.Popen([sys.executable, "-m", "buswitness.cli.main", "watch", str(adapter.link),
                                 "--baud", "19200", "--format", "8E1", "-o", str(out), "--duration", "4"],
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        end = time.monotonic() + 20
        while not (out.exists() and out.stat().st_size > 0) and time.monotonic() < end:
            time.sleep(0.05)
        for _ in range(6):
            adapter.send(req, 19200)
            time.sleep(0.03)
            adapter.send(rsp, 19200)
            time.sleep(0.1)
        stdout, stderr = proc.communicate(timeout=30)
    assert proc.returncode == 0, stderr
    data = b"".join(r.data for r in CaptureReader(out).iter_records())
    assert data == (req + rsp) * 6
    rows = [line for line in stdout.splitlines() if line.strip().startswith("station 9 ")]
    assert rows, stdout + stderr
    cells = _cells(rows[0])
    assert cells[:5] == ["station 9", "6", "6", "0", "0"], stdout + stderr  # station, requests, answered, late, timeouts


def test_live_decoder_that_falls_behind_switches_itself_off(monkeypatch):
    from buswitness.analysis import rolling

    header = CaptureHeader.new(SerialFormat.parse("8E1", 19200), [PortInfo(0, "p")])
    dec = LiveDecoder.create(header)
    if dec is None:
        pytest.skip("the decoder is not in this build")
    monkeypatch.setattr(rolling, "MAX_PENDING_RECORDS", 10)
    for i in range(11):
        dec.add(0, header.start_monotonic_ns + i, b"\x01", 0)
    assert dec.disabled_reason is not None and "could not keep up" in dec.disabled_reason
    dec.update()  # nothing left to decode, no error


# -- watch as a field tool: the analysis's own figures, live and after Ctrl-C ---------------------------

def _table_rows(text: str) -> dict[str, list[str]]:
    """The final table's rows by station label: requests, answered, late, timeouts, exc., CRC."""
    rows = {}
    final = text[text.index("stations: final figures"):]
    for line in final.splitlines():
        cells = _cells(line)
        if len(cells) == 10 and cells[1].isdigit():
            rows[cells[0]] = cells[1:7]
    return rows


@pytest.fixture(scope="module")
def late_capture(tmp_path_factory):
    """Ten seconds of the built-in late-station scenario: timeouts, late answers and CRC failures."""
    from buswitness.simulate import load_scenario, simulate

    path = tmp_path_factory.mktemp("late") / "late.bwcap"
    simulate(load_scenario("fault-late"), duration_s=10, seed=3, latency_ms=1.0, keep_tables=False).write(path)
    return path


def test_watch_figures_after_ctrl_c_equal_analyze_of_the_same_bytes(tmp_path, late_capture):
    import signal

    from buswitness.analysis import analyze
    from buswitness.analysis.stationmap import StationInfo, StationMap
    from buswitness.capture.sources import open_capture

    out = tmp_path / "watched.bwcap"
    with PtyAdapter(tmp_path / "ttyF") as adapter:
        proc = subprocess.Popen([sys.executable, "-m", "buswitness.cli.main", "watch", str(adapter.link), "-o", str(out),
                                 "--stations", "7=Slow drive"],
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        end = time.monotonic() + 20
        while not (out.exists() and out.stat().st_size > 0) and time.monotonic() < end:
            time.sleep(0.05)
        adapter.replay(late_capture)  # the recorded pace, through a real pty
        time.sleep(0.5)
        proc.send_signal(signal.SIGINT)
        stdout, stderr = proc.communicate(timeout=60)
    assert proc.returncode == 0, stderr
    shown = _table_rows(stdout)
    result = analyze(open_capture(out))
    smap = StationMap(stations={7: StationInfo(7, "Slow drive")})
    expected = {smap.label(s.address): [str(v) for v in (s.requests, s.answered, s.late, s.timeouts, s.exceptions,
                                                          s.crc_errors)]
                for s in result.stations if s.requests or s.crc_errors or s.answered}
    assert shown == expected, stdout + stderr
    assert "Slow drive (7)" in shown and int(shown["Slow drive (7)"][3]) > 0  # the late station did time out
    assert stdout.count("stations: final figures") == 1 and "stations (live)" not in stdout


def test_live_analysis_equals_analyze_while_keeping_the_sample_and_after_it(late_capture):
    from buswitness.analysis import analyze
    from buswitness.analysis.live import LiveAnalysis
    from buswitness.capture.sources import open_capture

    def key(res):
        return [(s.address, s.requests, s.answered, s.late, s.timeouts, s.exceptions, s.crc_errors, s.response_ms)
                for s in res.stations]

    expected = analyze(open_capture(late_capture))
    records = list(CaptureReader(late_capture).iter_records())
    for sample in (10**9, 500):  # finish while the delivery sample is kept; and past it (decoded again)
        live = LiveAnalysis(CaptureReader(late_capture).header, sample_records=sample)
        for i, r in enumerate(records):
            live.add(r.port, r.t_ns, r.data, r.flags)
            if i % 200 == 0:
                live.update(r.t_ns)
        final = live.finish()
        assert live.disabled_reason is None
        assert key(final) == key(expected), sample
        assert final.timeout.explanation == expected.timeout.explanation


def test_a_quiet_bus_shows_the_last_poll_without_waiting_for_the_next(late_capture):
    from buswitness.analysis.live import QUIET_PEEK_NS, LiveAnalysis

    records = [r for r in CaptureReader(late_capture).iter_records()]
    live = LiveAnalysis(CaptureReader(late_capture).header, timeout_ms=200.0)
    for r in records:
        live.add(r.port, r.t_ns, r.data, r.flags)
    last = records[-1].t_ns
    held = live.update(last)  # no time has passed: the last frame is still open
    shown = live.update(last + QUIET_PEEK_NS)  # quiet for longer than the master waits
    assert live.peeked
    final = live.finish()
    total = [sum(s.requests for s in r.stations) for r in (held, shown, final)]
    assert total[0] <= total[1] == total[2]


def test_stations_option_takes_a_list_of_names_or_a_station_map_file(tmp_path):
    from buswitness.cli.cmd_watch import stations_arg

    smap = stations_arg("7=Pump drive B, 9=Dosing pump")
    assert smap.label(7) == "Pump drive B (7)" and smap.label(9) == "Dosing pump (9)" and smap.label(3) == "station 3"
    toml = tmp_path / "stations.toml"
    toml.write_text('[stations.7]\nname = "Pump drive B"\n')
    assert stations_arg(str(toml)) == str(toml)  # read as analyze reads it, when the command starts


def test_timeout_in_use_is_shown_with_where_it_comes_from():
    from buswitness.analysis.timeout import TimeoutEstimate, given_timeout
    from buswitness.cli.cmd_watch import timeout_text

    assert timeout_text(given_timeout(200)) == "master timeout 200 ms (given)"
    inferred = TimeoutEstimate(150.0, "inferred", samples=12)
    assert timeout_text(inferred) == "master timeout about 150 ms (inferred so far from 12 unanswered requests)"
    assert "not inferred yet" in timeout_text(TimeoutEstimate(None, "not inferable"))


def test_a_slowly_polled_bus_shows_each_answer_before_the_next_poll():
    # The decoder closes a frame when the next byte arrives: on a bus polled every 3 s the old live
    # view showed each answer 3 s late (at the next poll). The live analysis counts it once the bus
    # has been quiet for longer than the master waits (1.5 x 200 ms here).
    from buswitness.analysis.live import LiveAnalysis

    header = CaptureHeader.new(SerialFormat.parse("8E1", 19200), [PortInfo(0, "p", latency_ms=1.0)])
    req = append_crc(bytes([7, 3, 0, 0, 0, 1]))
    rsp = append_crc(bytes([7, 3, 2, 0, 42]))
    t0 = header.start_monotonic_ns
    live = LiveAnalysis(header, timeout_ms=200.0)
    for i in range(4):
        t = t0 + i * 3_000_000_000
        live.add(0, t, req, 0)
        live.add(0, t + 20_000_000, rsp, 0)
        assert sum(s.answered for s in live.update(t + 20_000_000).stations) == i  # the answer's frame is open
        shown = live.update(t + 400_000_000)  # 0.4 s later, long before the next poll
        assert sum(s.answered for s in shown.stations) == i + 1
    assert sum(s.answered for s in live.finish().stations) == 4
