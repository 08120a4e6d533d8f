"""Reported and exported times are on the file's own clock: seconds since the capture start the
file states, and UTC where the header knows the wall clock (issue 12, item 6).

Source: the checks compare with times the test itself wrote into its inputs (hex lines, capture
headers) and with the simulator's truth; no check value comes from outside the project.
"""

from __future__ import annotations

from datetime import datetime, timedelta, timezone
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from buswitness.analysis import AnalysisOptions, analyze
from buswitness.analysis.dashboard import render_dashboard
from buswitness.analysis.summary import summary_dict
from buswitness.capture.fileformat import CaptureHeader, CaptureWriter, PortInfo
from buswitness.capture.sources import open_capture
from buswitness.cli.main import main
from buswitness.decode.timing import SerialFormat
from buswitness.simulate import START_MONOTONIC_NS, load_scenario, simulate

SAMPLES = Path(__file__).resolve().parent.parent / "sample_captures"
#: tiny-poll.hex's first line is at 0.004000 s; moved so that it reads 12.004311 s
SHIFT_S = 12.000311
S = 1_000_000_000


def _lines() -> tuple[list[str], list[tuple[float, str]]]:
    head, body = [], []
    for line in (SAMPLES / "tiny-poll.hex").read_text().splitlines():
        if line.startswith("#") or not line.strip():
            head.append(line)
        else:
            t, data = line.split(maxsplit=1)
            body.append((float(t), data))
    return head, body


def _hex_file(path: Path, shift_s: float, comments: bool = True) -> Path:
    head, body = _lines()
    text = (head if comments else [h for h in head if not h.startswith("# each")])
    path.write_text("\n".join(text + [f"{t + shift_s:.6f} {d}" for t, d in body]) + "\n")
    return path


def _export(path: Path, out: Path) -> dict[str, pd.DataFrame]:
    assert main(["analyze", str(path), "--csv", str(out), "--json", str(out / "summary.json"),
                 "--no-progress"]) == 0
    return {name: pd.read_csv(out / f"{name}.csv", keep_default_na=False)
            for name in ("transactions", "frames", "events")}


@pytest.fixture(scope="module")
def shifted(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("clock")
    plain = _export(_hex_file(tmp / "plain.hex", 0.0), tmp / "plain")
    moved = _export(_hex_file(tmp / "moved.hex", SHIFT_S), tmp / "moved")
    return plain, moved, tmp


def test_hex_file_starting_at_12_s_exports_times_from_12_s_not_0(shifted):
    _plain, moved, _tmp = shifted
    frames, tx = moved["frames"], moved["transactions"]
    first_line = 0.004 + SHIFT_S                                # 12.004311 s
    # the first frame ended when its line was read, or up to one adapter period (16 ms) before
    assert frames.t_end_high_s.iloc[0] == pytest.approx(first_line, abs=1e-6)
    assert first_line - 0.0175 <= frames.t_end_s.iloc[0] <= first_line
    assert first_line - 0.0175 <= tx.t_request_end_s.iloc[0] <= first_line
    assert f"{tx.t_request_end_s.iloc[0]:.1f}" == "12.0"
    # a hex file with relative times has no wall clock: no UTC invented
    assert (tx.utc == "").all() and (frames.utc == "").all()


def test_moving_a_hex_file_in_time_moves_every_exported_time_by_as_much(shifted):
    plain, moved, _tmp = shifted
    for name, cols in (("transactions", ["t_request_end_s"]),
                       ("frames", ["t_start_s", "t_end_s", "t_end_low_s", "t_end_high_s"]),
                       ("events", ["t_s"])):
        assert len(plain[name]) == len(moved[name])
        for c in cols:
            assert np.allclose(moved[name][c] - plain[name][c], SHIFT_S, atol=2e-6), (name, c)
    assert np.allclose(moved["transactions"].response_ms, plain["transactions"].response_ms, atol=1e-3,
                       equal_nan=True)


def test_summary_and_reports_use_the_same_clock_as_the_exports(shifted):
    _plain, moved, tmp = shifted
    result = analyze(open_capture(tmp / "moved.hex"), AnalysisOptions(progress=False))
    rows = result.worst_transactions(5)
    assert rows and all(r["t_s"] > 11.98 for r in rows)                # a 16 ms adapter: midpoints
    assert min(r["t_s"] for r in rows) == pytest.approx(moved["transactions"].t_request_end_s.min(), abs=1e-6)
    start, end = result.span_s
    assert start == 0.0 and 0.236 + SHIFT_S - 0.0175 <= end <= 0.236 + SHIFT_S
    page = render_dashboard(result)
    assert f"{min(r['t_s'] for r in rows):.3f} s" in page
    summary = summary_dict(result)
    assert summary["bus"]["duration_s"] == pytest.approx(end, abs=0.001)


def test_simulated_capture_gives_utc_that_lines_up_with_the_header_and_the_truth(tmp_path):
    res = simulate(load_scenario("clean"), duration_s=30, seed=2)
    cap = tmp_path / "c.bwcap"
    res.write(cap)
    truth = res.truth.transactions
    tables = _export(cap, tmp_path / "out")
    tx = tables["transactions"]
    start = datetime.fromisoformat("2026-11-30T22:00:00+00:00")
    for t_s, utc in zip(tx.t_request_end_s.tolist(), tx.utc.tolist()):
        want = (start + timedelta(seconds=t_s)).astimezone(timezone.utc)
        got = datetime.fromisoformat(utc.replace("Z", "+00:00"))
        assert abs((got - want).total_seconds()) <= 0.001
    # seconds since the capture start are the truth's own (record clock minus the header's start)
    true_s = (truth[truth.station != 0].t_request_end_ns.to_numpy() - START_MONOTONIC_NS) / S
    ours = tx[tx.station != 0].t_request_end_s.to_numpy()
    j = np.clip(np.searchsorted(true_s, ours), 1, len(true_s) - 1)
    nearest = np.minimum(np.abs(true_s[j] - ours), np.abs(true_s[j - 1] - ours))
    assert len(ours) > 50 and nearest.max() < 0.017                # within one 16 ms adapter period
    assert tx.utc.iloc[0].startswith("2026-11-30T22:00:00.0")


def test_evidence_late_answer_list_is_on_the_files_clock(tmp_path):
    res = simulate(load_scenario("fault-late"), duration_s=60, seed=1)
    cap = tmp_path / "late.bwcap"
    res.write(cap)
    result = analyze(open_capture(cap), AnalysisOptions(progress=False))
    late = result.late_answers(7)
    assert late
    truth = res.truth.transactions
    true_s = (truth.t_request_end_ns.to_numpy() - START_MONOTONIC_NS) / S
    start = datetime.fromisoformat("2026-11-30T22:00:00+00:00")
    for r in late:
        assert np.abs(true_s - r["t_s"]).min() < 0.017
        got = datetime.fromisoformat(r["utc"])
        assert abs((got - (start + timedelta(seconds=r["t_s"]))).total_seconds()) <= 0.001


def test_hex_lines_in_epoch_seconds_start_the_clock_at_the_first_line_with_its_utc(tmp_path):
    epoch = datetime(2026, 11, 30, 22, 0, tzinfo=timezone.utc).timestamp()
    path = _hex_file(tmp_path / "epoch.hex", epoch)
    tables = _export(path, tmp_path / "out")
    frames = tables["frames"]
    assert frames.t_end_high_s.iloc[0] == pytest.approx(0.0, abs=1e-6)
    first = datetime.fromisoformat(frames.utc.iloc[0].replace("Z", "+00:00"))
    line = datetime.fromtimestamp(epoch + 0.004, timezone.utc)
    assert timedelta(0) <= line - first <= timedelta(milliseconds=25)


def test_traffic_a_day_after_the_stated_start_keeps_its_times_without_a_day_of_empty_minutes(tmp_path):
    start_ns, two_days = 5 * S, 2 * 86400 * S
    header = CaptureHeader(serial=SerialFormat(), ports=[PortInfo(0, "test", 16.0, "user")],
                           start_utc="2026-11-30T22:00:00+00:00", start_monotonic_ns=start_ns)
    path = tmp_path / "late-start.bwcap"
    with CaptureWriter(path, header) as w:
        for t, data in _lines()[1]:
            w.append(0, start_ns + two_days + int(t * S), bytes.fromhex(data))
    result = analyze(open_capture(path), AnalysisOptions(progress=False))
    assert result.minutes() <= 2
    assert result.bus.duration_s < 120
    rows = result.worst_transactions(5)
    assert all(172799.98 < r["t_s"] < 172800.3 for r in rows)
    assert all(r["utc"][:18] in ("2026-12-02T21:59:5", "2026-12-02T22:00:0") for r in rows)
    start, end = result.span_s
    assert 172740.0 <= start <= 172800.0 < end < 172800.3
    assert "2026-12-02T22:00:00" in render_dashboard(result)
