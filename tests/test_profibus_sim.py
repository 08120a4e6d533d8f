"""Profibus DP end to end: the simulator's truth against what ``analyze`` reports (issue 13).

The simulator builds its telegrams on its own (simulate/profibus.py), the decoder frames and
pairs them from the adapter's records; per-station counts must equal the truth, at 1.5 Mbit/s
and at 187.5 kbit/s.

Source: the checks compare with the simulator's truth; telegram layouts are checked against pyprofibus in tests/test_profibus_fdl.py; no check value here comes from outside the project.
"""

from __future__ import annotations

import json

import pytest
from buswitness.analysis import AnalysisOptions, analyze
from buswitness.capture.sources import open_capture
from buswitness.simulate.profibus import simulate_profibus


@pytest.fixture(scope="module", params=[1_500_000, 187_500])
def run(request, tmp_path_factory):
    tmp = tmp_path_factory.mktemp(f"pb{request.param}")
    sim = simulate_profibus(duration_s=6.0 if request.param > 1e6 else 20.0, seed=3, baud=request.param)
    sim.write(tmp / "line.bwcap", tmp / "line.truth.json")
    result = analyze(open_capture(tmp / "line.bwcap"), AnalysisOptions(progress=False))
    return sim, json.loads((tmp / "line.truth.json").read_text()), result


def test_per_station_counts_equal_the_truth(run):
    sim, truth, result = run
    assert result.header.extra["protocol"] == "profibus-dp"
    for address, want in truth["stations"].items():
        s = result.station(int(address))
        assert s.requests == want["requests"], address
        assert s.answered == want["answered"], address
        assert s.timeouts == want["timeouts"], address
        assert s.retries == want["retries"], address


def test_the_faults_show_where_they_were_put(run):
    sim, truth, result = run
    st = truth["stations"]
    assert st[str(sim.sc.dropout_slave)]["dropouts"] >= 1 and st[str(sim.sc.dropout_slave)]["reparameterisations"] >= 1
    assert st[str(sim.sc.retry_slave)]["retries"] > 0
    assert result.station(sim.sc.retry_slave).retries == st[str(sim.sc.retry_slave)]["retries"]
    # the other slaves answered everything
    for address, want in st.items():
        if int(address) not in (sim.sc.dropout_slave, sim.sc.retry_slave):
            assert want["timeouts"] == 0 and result.station(int(address)).timeouts == 0


def test_profibus_figures_and_findings_reach_the_reports(run, tmp_path):
    from buswitness.analysis.dashboard import write_dashboard
    from buswitness.analysis.evidence import write_evidence
    sim, truth, result = run
    pf = result.protocol_figures
    drop = sim.sc.dropout_slave
    assert pf["slaves"][drop]["dropouts"] == truth["stations"][str(drop)]["dropouts"]
    assert pf["slaves"][drop]["reparameterisations"] == truth["stations"][str(drop)]["reparameterisations"]
    diag = sim.sc.diag_slave
    assert pf["slaves"][diag]["diagnosis_flags"] == truth["stations"][str(diag)]["diagnosis_flags"]
    for master, n in truth["tokens_passed"].items():
        assert pf["masters"][int(master)]["tokens"] == n
    rules = {(f.rule, f.station) for f in result.findings}
    assert ("needs-retries", sim.sc.retry_slave) in rules
    html = write_dashboard(result, tmp_path / "d.html").read_text()
    assert 'id="protocol-slaves"' in html and f"slave {drop}" in html
    text = write_evidence(result, drop, tmp_path / "e.html").read_text()
    assert "drop-outs (Profibus DP)" in text
    assert f"{result.station(drop).requests:,}</td>" in text  # counts with thousands separators


def test_cli_simulate_and_analyze_with_protocol_option(tmp_path):
    import subprocess
    import sys
    run_cli = lambda *a: subprocess.run([sys.executable, "-m", "buswitness.cli.main", *a], cwd=tmp_path,
                                        capture_output=True, text=True)
    r = run_cli("simulate", "--protocol", "profibus-dp", "--duration", "2s", "--baud", "187500", "-o", "p.bwcap",
                "--truth", "p.json")
    assert r.returncode == 0, r.stderr
    r = run_cli("analyze", "p.bwcap", "--protocol", "profibus-dp", "--no-progress", "--json", "s.json",
                "--html", "d.html")
    assert r.returncode == 0, r.stderr
    truth = json.loads((tmp_path / "p.json").read_text())
    for address, want in truth["stations"].items():
        assert f"station {address}: {want['requests']} requests, {want['answered']} answered" in r.stdout
    r = run_cli("analyze", "p.bwcap", "--protocol", "fieldbus-x", "--no-progress")
    assert r.returncode == 2 and "fieldbus-x" in r.stderr


def test_detect_checks_a_profibus_capture_with_its_own_framing():
    from pathlib import Path

    from buswitness import detect
    path = Path(__file__).resolve().parent.parent / "sample_captures" / "mixing-line-profibus-12s.bwcap"
    src = open_capture(path)
    assert src.header.extra["protocol"] == "profibus-dp"
    as_profibus = detect.check_capture(src.header.serial, src.iter_batches(), protocol="profibus-dp")
    assert as_profibus.looks_right and as_profibus.score.explained == 1.0
    as_modbus = detect.check_capture(src.header.serial, open_capture(path).iter_batches(), protocol="modbus-rtu")
    assert as_modbus.score.explained < 0.5


def test_record_stores_the_protocol_in_the_header():
    import argparse

    from buswitness.cli import cmd_record
    parser = argparse.ArgumentParser()
    sub = parser.add_subparsers()
    cmd_record.add_parser(sub)
    import os
    master, slave = os.openpty()  # a real serial-like port: record refuses anything that is not a tty
    try:
        port = os.ttyname(slave)
        args = parser.parse_args(["record", port, "-o", "x.bwcap", "--protocol", "profibus-dp", "--baud", "1500000"])
        cfg = cmd_record.config_from_args(args, args.ports)
        assert cfg.extra["protocol"] == "profibus-dp"
        old = parser.parse_args(["record", port, "-o", "x.bwcap", "--protocol", "rtu"])
        assert cmd_record.config_from_args(old, old.ports).extra["protocol"] == "modbus-rtu"
    finally:
        os.close(master)
        os.close(slave)
