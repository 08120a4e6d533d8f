"""The evidence report on one station: identity, method, figures equal to analyze's, late list.

Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

from __future__ import annotations

import hashlib
import re

import pytest
from buswitness.analysis.evidence import evidence_data, render_evidence
from buswitness.analysis.finding import WIRING_CAUTION, Finding
from buswitness.analysis.pipeline import analyze_tables
from buswitness.analysis.summary import summary_dict
from buswitness.errors import UsageError
from test_analysis_support import Tx, header, night, tables


@pytest.fixture(scope="module")
def result(tmp_path_factory):
    r = analyze_tables(header(), night(minutes=5))
    part = tmp_path_factory.mktemp("cap") / "night.bwcap"
    part.write_bytes(b"capture bytes")
    r.paths = [str(part)]
    return r


def test_capture_identity_carries_the_sha256_of_each_part(result):
    page = render_evidence(result, 7)
    assert hashlib.sha256(b"capture bytes").hexdigest() in page and "night.bwcap" in page
    assert "latency timer 1.0 ms (user)" in page and "19200 8E1" in page


def test_figures_equal_those_in_summary_json(result):
    station = next(s for s in summary_dict(result)["stations"] if s["address"] == 7)
    data = evidence_data(result, 7)
    assert data["s"].to_dict()["response_ms"] == station["response_ms"]
    for key in ("requests", "answered", "timeouts", "late", "exceptions", "crc_errors", "collisions"):
        assert getattr(data["s"], key) == station[key]
    page = render_evidence(result, 7)
    assert f"{station['response_ms']['p95']:.2f}" in page


def test_every_late_answer_is_listed_with_time_and_frames(result):
    page = render_evidence(result, 7)
    late = result.station(7).late
    assert f"Every late answer ({late})" in page
    assert len(re.findall(r"<td class=\"hex\">07 03 04", page)) == late


def test_report_states_what_the_capture_cannot_show_and_the_timeout_source(result):
    page = render_evidence(result, 7)
    assert "What this capture cannot show" in page and "inferred" in page
    assert "<script" not in page


def test_wiring_caution_appears_when_a_finding_for_the_station_carries_it(result):
    result.findings = [Finding("late-answers", "warning", "station 7 answers late", station=7, caution=WIRING_CAUTION)]
    try:
        page = render_evidence(result, 7)
    finally:
        result.findings = []
    assert "station 7 answers late" in page and "licensed" in page


def test_a_station_not_in_the_capture_is_a_clear_error(result):
    with pytest.raises(UsageError, match=r"station 42 does not appear in this capture \(stations polled: 1, 2, 7\)"):
        render_evidence(result, 42)


def test_hostile_station_name_is_escaped(tmp_path):
    from buswitness.analysis.pipeline import AnalysisOptions
    from buswitness.analysis.stationmap import load_station_map
    p = tmp_path / "s.toml"
    p.write_text('[stations.4]\nname = "<script>alert(1)</script>"\n')
    r = analyze_tables(header(), [tables([Tx(1.0, 4, "ok", 5.0)])], AnalysisOptions(station_map=load_station_map(p)))
    page = render_evidence(r, 4)
    assert "&lt;script&gt;alert(1)&lt;/script&gt; (4)" in page and "<script>alert" not in page
