"""What ``analyze`` prints: each finding told as the dashboard tells it, times in the site's local time.

Source: the checks compare the printed text with the project's own Finding objects (the text the
dashboard renders) and with time-zone arithmetic done in the test; the UTC+05:30 zone is a POSIX TZ
string (POSIX.1 TZ variable: "std offset", the offset counted west of Greenwich), used because it
needs no time-zone database.
"""

from __future__ import annotations

import html
import json
import os
import subprocess
import sys
from datetime import datetime, timedelta, timezone
from pathlib import Path

import pytest
from buswitness.analysis.finding import SEVERITIES
from buswitness.cli.main import main

SAMPLES = Path(__file__).resolve().parent.parent / "sample_captures"
CAPTURE = SAMPLES / "pumpstation-5min.bwcap"
#: UTC+05:30 in POSIX TZ notation (the sign is west of Greenwich): no tz database needed.
TZ_PLUS_0530 = "XST-5:30"


@pytest.fixture(scope="module")
def analysed(tmp_path_factory):
    folder = tmp_path_factory.mktemp("analysed")
    env = dict(os.environ, TZ=TZ_PLUS_0530, COLUMNS="2000")
    proc = subprocess.run([sys.executable, "-m", "buswitness.cli.main", "analyze", str(CAPTURE), "--html",
                           str(folder / "report.html"), "--json", str(folder / "summary.json"), "--no-progress"],
                          capture_output=True, text=True, env=env, timeout=300)
    assert proc.returncode == 0, proc.stderr
    return proc.stdout, (folder / "report.html").read_text(), json.loads((folder / "summary.json").read_text())


def _result():
    from buswitness.analysis import analyze
    from buswitness.capture.sources import open_capture
    return analyze(open_capture(CAPTURE))


def test_every_finding_prints_its_headline_likely_cause_and_check_as_the_dashboard_has_them(analysed):
    out, report, _ = analysed
    result = _result()
    assert result.findings
    for f in result.findings:
        assert f.statement in out
        assert html.escape(f.statement, quote=False) in report or f.statement in html.unescape(report)
        if f.causes:
            c = f.causes[0]
            assert f"most likely cause: {c.cause}" in out and f"what to check: {c.check}" in out
            dashboard = html.unescape(report)
            assert c.cause in dashboard and f"What to check: {c.check}" in dashboard


def test_findings_are_printed_most_severe_first(analysed):
    out, _, _ = analysed
    block = out[out.index("findings, most severe first:"):out.index("\nstations:")]
    severities = [line.split("[", 1)[1].split("]", 1)[0] for line in block.splitlines()
                  if line.lstrip()[:1].isdigit() and "[" in line]
    assert severities and [SEVERITIES.index(s) for s in severities] == sorted(SEVERITIES.index(s) for s in severities)


def test_times_are_the_sites_local_time_with_its_offset_and_files_keep_utc(analysed):
    out, _, summary = analysed
    start_utc = datetime.fromisoformat(summary["capture"]["start_utc"])
    assert start_utc.utcoffset() == timedelta(0)  # the file keeps UTC
    local = start_utc.astimezone(timezone(timedelta(hours=5, minutes=30)))
    assert f"started: {local:%Y-%m-%d %H:%M:%S} UTC+05:30 (site local time; files keep UTC)" in out
    assert f"when: {local:%Y-%m-%d %H:%M:%S} UTC+05:30 to " in out


def test_the_dashboard_names_the_same_local_start_as_the_terminal(analysed):
    out, page, summary = analysed
    start_utc = datetime.fromisoformat(summary["capture"]["start_utc"])
    local = start_utc.astimezone(timezone(timedelta(hours=5, minutes=30)))
    assert f"{local:%Y-%m-%d %H:%M:%S} UTC+05:30 local" in html.unescape(page)


def test_the_evidence_report_gives_its_span_in_local_time_too(tmp_path):
    env = dict(os.environ, TZ=TZ_PLUS_0530)
    out = tmp_path / "ev.html"
    proc = subprocess.run([sys.executable, "-m", "buswitness.cli.main", "evidence", str(CAPTURE), "--station", "7",
                           "-o", str(out), "--no-progress"], capture_output=True, text=True, env=env, timeout=300)
    assert proc.returncode == 0, proc.stderr
    page = html.unescape(out.read_text())
    assert " UTC (" in page and "UTC+05:30</span>, local time where it was analysed)" in page


def test_until_and_the_printed_times_use_the_same_zone():
    code = ("from datetime import datetime, timezone\n"
            "from buswitness.cli.cmd_record import until_instant, seconds_until\n"
            "from buswitness.cli.report_text import local_time\n"
            "now = datetime(2026, 12, 1, 20, 0, tzinfo=timezone.utc)\n"  # 01:30 on 2 Dec at UTC+05:30
            "print(local_time(until_instant('07:00', now)))\n"
            "print(until_instant('07:00', now).astimezone(timezone.utc).isoformat())\n"
            "print(seconds_until('07:00', now))\n")
    env = dict(os.environ, TZ=TZ_PLUS_0530)
    lines = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env,
                           check=True).stdout.split("\n")
    assert lines[0] == "2026-12-02 07:00:00 UTC+05:30"
    assert lines[1] == "2026-12-02T01:30:00+00:00"
    assert float(lines[2]) == 5.5 * 3600


def test_until_help_says_a_naive_time_is_the_sites_local_time(capsys):
    with pytest.raises(SystemExit):
        main(["record", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "--until HH:MM stop the next time the clock shows this time of day, in the site's local time" in text


def test_a_capture_without_a_wall_clock_gives_hours_since_the_start(capsys, tmp_path):
    assert main(["analyze", str(SAMPLES / "tiny-poll.hex"), "--json", str(tmp_path / "s.json"), "--no-progress"]) == 0
    out = capsys.readouterr().out
    assert "started:" not in out and "UTC+" not in out
