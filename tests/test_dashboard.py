"""The dashboard file: self-contained, escaped, built from the analysis result.

Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

from __future__ import annotations

import json
import re

from buswitness.analysis.dashboard import render_dashboard
from buswitness.analysis.pipeline import analyze_tables
from buswitness.analysis.render import script_json
from test_analysis_support import Tx, header, night, report_id_response, tables

HOSTILE = b"</script><script>alert(1)</script><img src=x onerror=alert(2)>"


def _page() -> str:
    outs = night(minutes=3)
    outs.append(tables([Tx(200.0, 9, "ok", 20.0, function=0x11, response=report_id_response(9, HOSTILE))]))
    return render_dashboard(analyze_tables(header(), outs))


def test_device_id_text_is_escaped_in_the_page():
    page = _page()
    assert "&lt;/script&gt;&lt;script&gt;alert(1)&lt;/script&gt;&lt;img src=x onerror=alert(2)&gt;" in page
    assert "<img src=x" not in page and "alert(1)</script>" not in page


def test_script_json_cannot_close_its_script_element():
    text = script_json({"name": "</script><b>&"})
    assert "<" not in text and ">" not in text and "&" not in text
    assert json.loads(text) == {"name": "</script><b>&"}


def test_page_refers_to_no_remote_resource():
    page = _page()
    # every src/href attribute is local (none at all in our own markup); plotly's own strings may name URLs
    assert not re.search(r"""<(script|link|img|iframe)[^>]+(src|href)\s*=\s*["']?(https?:)?//""", page)
    assert "Content-Security-Policy" in page and "default-src 'none'" in page


def test_station_table_has_a_row_per_station_and_the_timeout_line():
    page = _page()
    rows = re.findall(r'<tr data-address="(\d+)">', page)
    assert rows == ["1", "2", "7", "9"]
    assert "master timeout 200 ms (inferred)" in page


def test_findings_fill_the_summary_band_with_their_caution():
    from buswitness.analysis.finding import WIRING_CAUTION, Cause, Finding
    result = analyze_tables(header(), night(minutes=3))
    result.findings = [Finding("late-answers", "warning", "Station 7 answers after the master's 200 ms timeout.",
                               station=7, t_start_s=0.0, t_end_s=180.0, evidence={"late": 12},
                               causes=[Cause("the device is slow", "its configured response delay")],
                               caution=WIRING_CAUTION)]
    page = render_dashboard(result)
    assert 'class="sev sev-warning"' in page and "answers after the master&#39;s 200 ms timeout." in page
    assert "the device is slow <span class=\"next\">What to check: its configured response delay" in page
    assert "licensed" in page
    assert "No findings were raised" not in page


def test_evidence_values_read_as_text_not_python_reprs():
    from buswitness.analysis.render import evidence_items
    items = dict(evidence_items({"damaged_share": 0.98799, "functions": {"3": 3835}, "t35_observable": False,
                                 "worst": [{"t_s": 1.5, "gap_ms": 20.0}]}))
    assert items == {"damaged share": "0.988", "functions": "3 3835", "t35 observable": "no",
                     "worst": "t s 1.5, gap ms 20"}
