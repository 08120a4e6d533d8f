"""The dashboard file: self-contained, escaped, built from the analysis result.

Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

from __future__ import annotations

import hashlib
import json
import re
from pathlib import Path

import numpy as np
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


# -- a light page: the partial plotly.js bundle, vendored with its licence ------------------------------

VENDOR = Path(__file__).resolve().parents[1] / "analysis" / "templates" / "vendor"


def _charts_of(page: str) -> dict:
    m = re.search(r'<script type="application/json" id="bw-charts">(.*?)</script>', page, re.S)
    return json.loads(m.group(1))


def test_the_inlined_plotly_is_the_vendored_partial_bundle_with_its_licence_beside_it():
    bundle = (VENDOR / "plotly-cartesian.min.js").read_bytes()
    # the file as npm pack plotly.js-cartesian-dist-min@4.1.1 delivers it (analysis/templates/vendor/README.md)
    assert hashlib.sha256(bundle).hexdigest() == "79542150855a52c567260e3137095dbe2b744e6d702a5cabe67da246942fba7a"
    assert bundle.startswith(b"/**\n* plotly.js (cartesian - minified) v4.1.1")
    assert "MIT License" in (VENDOR / "plotly-cartesian.LICENSE").read_text()
    notice = (VENDOR / "README.md").read_text()
    assert "plotly.js-cartesian-dist-min" in notice and "4.1.1" in notice
    page = _page()
    assert "plotly.js (cartesian - minified) v4.1.1" in page and "plotly.js v4" not in page[:200]


def test_a_small_capture_makes_a_page_under_two_megabytes_with_no_share_button_and_svg_traces_only():
    page = _page()
    assert len(page.encode()) <= 2_000_000
    assert "displaylogo: false" in page and "showSendToCloud: false" in page
    charts = _charts_of(page)
    types = {t["type"] for key, spec in charts.items() if isinstance(spec, dict) for t in spec["data"]}
    assert types <= {"scatter", "bar", "heatmap"}


def test_response_time_is_one_small_plot_per_station_on_one_linked_time_axis():
    charts = _charts_of(_page())
    rt = charts["rt"]
    axes = sorted({t["xaxis"] for t in rt["data"]})
    assert len(axes) == 4  # stations 1, 2, 7 and 9 answered: one plot each
    assert all(rt["layout"][f"xaxis{a[1:]}"].get("matches") == "x" for a in axes if a != "x")
    assert sum(1 for t in rt["data"] if t["showlegend"]) == 3  # p50, p95, slowest: one legend for all plots
    assert all(t["x"] == "@time" for t in rt["data"])


def test_an_empty_capture_shows_the_critical_finding_and_no_empty_chart_or_table():
    from buswitness.analysis.findings import evaluate

    result = analyze_tables(header(), [])
    result.findings = evaluate(result)
    page = render_dashboard(result)
    assert 'class="sev sev-critical"' in page and "No traffic" in page
    for section in ("response-time", "availability", "distribution", "timeline", "utilisation", "events",
                    "stations", "frames"):
        assert f'<section id="{section}"' not in page, section
    assert "No findings were raised" not in page


def test_a_forty_second_capture_is_drawn_in_bins_of_seconds_not_one_minute_point():
    from buswitness.analysis.timebins import TimeDetail, bins_for

    outs = [tables([Tx(0.1 + 0.5 * i + 0.1 * k, st, "ok", 10.0 + st) for i in range(80)
                    for k, st in enumerate((1, 2, 3))])]
    result = analyze_tables(header(), outs)
    assert result.minutes() <= 2
    detail = TimeDetail(5_000_000_000_000)  # T0 of test_analysis_support
    for o in outs:
        detail.add(o.frames, o.transactions, o.events)
    bins = bins_for(result, detail)
    assert bins.width_s == 2 and len(bins.x) >= 15  # 3 polls of a 0.5 s cycle in each bin
    assert sum(bins.stations[1]["requests"]) == 80
    page = render_dashboard(result, detail)
    assert len(_charts_of(page)["time"]) == len(bins.x)


def test_a_long_capture_folds_whole_minutes_and_reads_percentiles_from_the_added_histograms():
    from buswitness.analysis.timebins import bins_for

    result = analyze_tables(header(), night(minutes=30))
    bins = bins_for(result)
    assert bins.width_s == 60 and len(bins.x) == result.minutes()
    bands = result.response_bands(7, k=10)
    assert len(bands["p95"]) == -(-result.minutes() // 10)
    assert np.nanmax(bands["max"]) == max(v for v in result.station_series(7)["rt_max"] if v == v)


def test_the_distribution_names_the_answers_adapter_latency_puts_at_zero():
    outs = [tables([Tx(0.1 + 0.5 * i, 1, "ok", 0.0 if i % 10 == 0 else 12.0) for i in range(200)])]
    page = render_dashboard(analyze_tables(header(), outs))
    notes = " ".join(a["text"] for a in _charts_of(page)["dist"]["layout"]["annotations"])
    assert "20 answers read as about 0 ms" in notes and "latency timer 1 ms" in notes
