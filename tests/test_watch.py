"""``watch`` and the rolling per-station counters behind it.

Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

from __future__ import annotations

import math
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
    rows = [line for line in stdout.splitlines() if line.strip("│ ").startswith("9 ")]
    assert rows, stdout + stderr
    cells = [c.strip() for c in rows[0].strip("│").split("│")]
    assert cells[:4] == ["9", "6", "6", "0"], stdout + stderr


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
