"""The dashboard's content-security policy never allows the evaluation of strings ('unsafe-eval'), lets plotly's
"download as PNG" make its image (data: and blob: images), and the evidence report allows no script at all.

The dashboard inlines a partial plotly.js bundle with SVG traces only (analysis/templates/vendor/README.md):
no WebGL trace (whose regl layer compiles draw calls with the Function constructor) is drawn, because a
long capture is drawn in coarser time bins (analysis/timebins.py) instead of more points.
Source: the policy keywords are those of the W3C Content Security Policy Level 3 recommendation
(from memory); every other check compares with what the test itself made.
"""

from __future__ import annotations

import re

import pytest
from buswitness.cli.main import main


@pytest.fixture(scope="module")
def capture(tmp_path_factory):
    d = tmp_path_factory.mktemp("csp")
    assert main(["simulate", "--duration", "3m", "-o", str(d / "s.bwcap")]) == 0
    return d


def policy(page: str) -> str:
    m = re.search(r'<meta http-equiv="Content-Security-Policy" content="([^"]*)">', page)
    assert m, "no policy"
    return m.group(1)


def test_a_dashboard_allows_no_eval_and_images_only_from_data_and_blob(capture):
    assert main(["analyze", str(capture / "s.bwcap"), "--no-progress", "--html", str(capture / "r.html")]) == 0
    page = (capture / "r.html").read_text(encoding="utf-8")
    csp = policy(page)
    assert "'unsafe-eval'" not in csp
    assert "default-src 'none'" in csp and "script-src 'unsafe-inline'" in csp
    assert "img-src data: blob:" in csp
    assert '"type":"scattergl"' not in page and '"type":"scatter"' in page


def test_a_week_is_drawn_in_coarser_bins_not_with_webgl():
    from buswitness.analysis.timebins import MAX_BINS, MINUTE_STEPS

    week = 7 * 24 * 60
    k = next(k for k in MINUTE_STEPS if week / k <= MAX_BINS)
    assert k == 15 and week / k <= MAX_BINS  # 672 bins of 15 minutes, each an SVG point per trace


def test_the_evidence_report_allows_no_script(capture):
    out = capture / "ev.html"
    assert main(["evidence", str(capture / "s.bwcap"), "--station", "1", "--no-progress", "-o", str(out)]) == 0
    page = out.read_text(encoding="utf-8")
    csp = policy(page)
    assert csp == "default-src 'none'; style-src 'unsafe-inline'"
    assert "<script" not in page


@pytest.mark.browser
def test_the_dashboard_draws_every_chart_under_its_policy_without_a_violation(capture):
    from browser import OfflinePage, require_chromium

    require_chromium()
    assert main(["analyze", str(capture / "s.bwcap"), "--no-progress", "--html", str(capture / "b.html")]) == 0
    with OfflinePage(capture / "b.html") as (page, visit):
        page.wait_for_function("() => document.body.dataset.charts === 'drawn'", timeout=30_000)
        for chart in ("chart-rt", "chart-avail", "chart-dist", "chart-timeline", "chart-util"):
            assert page.evaluate(f"document.querySelectorAll('#{chart} .main-svg').length") > 0, chart
    assert visit.errors == [], visit.errors  # a policy violation is a console error in Chromium
    assert not [m for m in visit.console if "Content Security Policy" in m]
