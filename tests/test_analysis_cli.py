"""``buswitness analyze`` and ``buswitness evidence`` on the command line.

Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

from __future__ import annotations

import json
import os
import stat
from pathlib import Path

import pytest
from buswitness.cli.main import main

SAMPLES = Path(__file__).resolve().parent.parent / "sample_captures"


@pytest.fixture()
def readonly_capture(tmp_path):
    src = SAMPLES / "tiny-poll.hex"
    folder = tmp_path / "stick"
    folder.mkdir()
    target = folder / "tiny-poll.hex"
    target.write_bytes(src.read_bytes())
    target.chmod(stat.S_IRUSR)
    folder.chmod(stat.S_IRUSR | stat.S_IXUSR)
    yield target
    folder.chmod(stat.S_IRWXU)


def test_analyze_with_no_output_option_writes_report_and_summary_here(tmp_path, monkeypatch, capsys,
                                                                      readonly_capture):
    work = tmp_path / "work"
    work.mkdir()
    monkeypatch.chdir(work)
    assert main(["analyze", str(readonly_capture), "--no-progress"]) == 0
    out = capsys.readouterr().out
    assert str(work / "report.html") in out and str(work / "summary.json") in out
    summary = json.loads((work / "summary.json").read_text())
    assert summary["schema_version"] == 1
    assert [s["address"] for s in summary["stations"]] == [1, 7, 11]
    assert "station 11: 1 requests, 1 answered, 0 timeouts, 0 late, 1 exceptions" in out


def test_analyze_writes_only_the_outputs_asked_for(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert main(["analyze", str(SAMPLES / "tiny-poll.hex"), "--csv", "tables", "--timeout", "200ms",
                 "--no-progress"]) == 0
    assert sorted(os.listdir(tmp_path)) == ["tables"]
    assert sorted(os.listdir(tmp_path / "tables")) == ["events.csv", "frames.csv", "transactions.csv"]


def test_given_timeout_is_reported_as_given(tmp_path):
    out = tmp_path / "s.json"
    assert main(["analyze", str(SAMPLES / "tiny-poll.hex"), "--json", str(out), "--timeout", "250",
                 "--no-progress"]) == 0
    assert json.loads(out.read_text())["timeout"] == pytest.approx(
        {"timeout_ms": 250.0, "source": "given", "samples": 0, "silence_p5_ms": None, "silence_p50_ms": None,
         "silence_p95_ms": None, "nearest_round_ms": None,
         "explanation": "250 ms, given on the command line (--timeout)"})


def test_station_map_labels_reach_the_summary(tmp_path):
    smap = tmp_path / "stations.toml"
    smap.write_text('[stations.7]\nname = "Pump drive B"\nposition_m = 75\n')
    out = tmp_path / "s.json"
    assert main(["analyze", str(SAMPLES / "tiny-poll.hex"), "--json", str(out), "--stations", str(smap),
                 "--no-progress"]) == 0
    st7 = next(s for s in json.loads(out.read_text())["stations"] if s["address"] == 7)
    assert st7["label"] == "Pump drive B (7)" and st7["position_m"] == 75


def test_bad_station_map_is_a_one_line_error(tmp_path, capsys):
    smap = tmp_path / "stations.toml"
    smap.write_text("[stations.300]\nname = 'x'\n")
    assert main(["analyze", str(SAMPLES / "tiny-poll.hex"), "--stations", str(smap), "--no-progress"]) == 3
    assert "'300' is not a station address" in capsys.readouterr().err


def test_evidence_writes_the_report_for_one_station(tmp_path, capsys):
    out = tmp_path / "station7.html"
    assert main(["evidence", str(SAMPLES / "tiny-poll.hex"), "--station", "7", "-o", str(out),
                 "--no-progress"]) == 0
    page = out.read_text()
    assert "Response behaviour of station 7" in page and "SHA-256" in page
    assert str(out) in capsys.readouterr().out


def test_evidence_for_an_absent_station_exits_with_a_usage_error(tmp_path, capsys):
    assert main(["evidence", str(SAMPLES / "tiny-poll.hex"), "--station", "42", "-o", str(tmp_path / "x.html"),
                 "--no-progress"]) == 2
    assert "station 42 does not appear in this capture" in capsys.readouterr().err
    assert not (tmp_path / "x.html").exists()


def test_analyze_of_an_empty_file_is_a_clear_error(tmp_path, capsys):
    empty = tmp_path / "empty.bwcap"
    empty.write_bytes(b"")
    assert main(["analyze", str(empty), "--no-progress"]) == 3
    assert "is empty" in capsys.readouterr().err


def test_damaged_capture_is_analysed_and_the_damage_reported(tmp_path, capsys):
    from buswitness.simulate import load_scenario, simulate
    capture = tmp_path / "cut.bwcap"
    simulate(load_scenario("pumpstation"), duration_s=120, seed=1, keep_tables=False).write(capture)
    data = capture.read_bytes()
    capture.write_bytes(data[: len(data) - 5000])  # a copy cut short
    out = tmp_path / "s.json"
    html = tmp_path / "r.html"
    assert main(["analyze", str(capture), "--json", str(out), "--html", str(html), "--no-progress"]) == 0
    damage = json.loads(out.read_text())["capture"]["damage"]
    assert damage["clean"] is False and damage["truncated_tail"] is True
    assert "The capture file is damaged" in html.read_text()
    assert "capture damage:" in capsys.readouterr().out


def test_raw_bytes_without_timestamps_are_flagged_as_untimed(tmp_path, capsys):
    html = tmp_path / "r.html"
    assert main(["analyze", str(SAMPLES / "tiny-poll.bin"), "--input-kind", "raw", "--baud", "19200",
                 "--format", "8E1", "--html", str(html), "--no-progress"]) == 0
    assert "this input has no timestamps" in capsys.readouterr().out
    assert "No timing in this input" in html.read_text()


def test_roles_given_to_analyze_set_the_direction_of_every_frame(tmp_path, capsys):
    capture = str(SAMPLES / "pumpstation-5min.bwcap")
    both, slaves = tmp_path / "both.json", tmp_path / "slaves.json"
    assert main(["analyze", capture, "--json", str(both), "--no-progress"]) == 0
    assert main(["analyze", capture, "--roles", "slaves", "--json", str(slaves), "--no-progress"]) == 0
    assert json.loads(both.read_text())["bus"]["requests"] > 1000
    # A port that hears only the stations carries no request at all.
    assert json.loads(slaves.read_text())["bus"]["requests"] == 0


def test_more_roles_than_ports_is_a_usage_error(capsys):
    with pytest.raises(SystemExit) as exc:
        main(["analyze", "x.bwcap", "--roles", "master,slaves,both"])
    assert exc.value.code == 2
