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
    assert f"{station['response_ms']['p95']:.1f}" in page  # response times to one decimal throughout


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


# -- a report a vendor reads --------------------------------------------------------------------------------

def _text(page: str) -> str:
    return re.sub(r"\s+", " ", re.sub(r"<[^>]+>", " ", page))


def test_finding_figures_read_as_a_sentence_not_a_key_value_dump(result):
    from buswitness.analysis.render import evidence_sentence

    result.findings = [Finding("duplicate-address", "critical", "Two devices probably answer as station 7.", station=7,
                               evidence={"requests": 1929, "damaged": 1142, "damaged_share": 0.59202,
                                         "crc_errors": 1145, "orphan_answers": 748})]
    try:
        page = render_evidence(result, 7)
    finally:
        result.findings = []
    assert " · " not in page and "damaged share:" not in page
    sentence = evidence_sentence({"requests": 1929, "damaged": 1142, "damaged_share": 0.59202, "crc_errors": 1145})
    assert sentence == "1,929 requests, 1,142 damaged, damaged share 59%, 1,145 CRC errors."
    assert "In figures: 1,929 requests, 1,142 damaged, damaged share 59%, 1,145 CRC errors, 748 orphan answers." in page


def test_a_duplicate_address_is_headlined_by_its_share_of_garbled_answers_not_by_zero_timeouts():
    from buswitness.analysis.evidence import headline_cards

    txs = [Tx(0.1 + 0.5 * i, 3, "corrupt" if i % 2 else "ok", 12.0) for i in range(200)]
    r = analyze_tables(header(), [tables(txs)])
    s = r.station(3)
    found = [Finding("duplicate-address", "critical", "Two devices probably answer as station 3.", station=3,
                     evidence={"orphan_answers": 17})]
    cards = headline_cards(r, s, found)
    assert cards[0] == {"value": "50%", "caption": "of its answers garbled"}
    assert {"value": "17", "caption": "valid answers when none was awaited"} in cards
    assert not any("timeout" in c["caption"] for c in cards)
    plain = headline_cards(r, s, [])
    assert any("timeouts" in c["caption"] for c in plain)


def test_exception_counts_are_written_out_with_the_names_of_the_standard():
    from buswitness.analysis.render import exceptions_sentence

    # exception codes 02 and 04 and their names: MAP V1.1b3 section 7 p48-49
    assert exceptions_sentence({4: 137, 2: 3}) == ("137 answers with exception 04, server device failure; "
                                                   "3 with exception 02, illegal data address")
    txs = [Tx(0.1 + 0.5 * i, 5, "exception" if i % 10 == 0 else "ok", 20.0, exception_code=4) for i in range(300)]
    page = render_evidence(analyze_tables(header(), [tables(txs)]), 5)
    assert "30 answers with exception 04, server device failure" in _text(page)


def test_a_silent_capture_gives_a_report_that_leads_with_the_critical_finding_and_shows_no_empty_figures():
    from buswitness.analysis.findings import evaluate

    r = analyze_tables(header(), [])
    r.findings = evaluate(r)
    page = render_evidence(r, 7)
    text = _text(page)
    assert 'class="sev sev-critical"' in page and "No traffic" in text
    assert "cannot serve as evidence on station 7" in text and "valid frames in the whole capture" in text
    assert "3. Figures for" not in text and "5. Every late answer" not in text
    assert "licensed practice" in text  # the safety caution of a finding whose next step is wiring work


def test_times_hex_and_digests_are_marked_so_they_never_break_inside_and_print_fits_a4(result):
    page = render_evidence(result, 7)
    assert re.search(r'<td class="ts">\d{4}-\d\d-\d\d \d\d:\d\d:\d\d\.\d{3}</td>', page)
    assert re.search(r'<td class="hex">([0-9A-F]{2} )+[0-9A-F]{2}</td>', page)
    css = page[page.index("<style>"):page.index("</style>")]
    assert "break-all" not in css and ".ts, .tok, .digest, td.n { white-space: nowrap; }" in css
    assert "@page { size: A4;" in css and "thead { display: table-header-group; }" in css
