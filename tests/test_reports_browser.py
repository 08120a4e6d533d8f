"""Issue 15's reports in headless Chromium: the demo's and a silent capture's dashboard and evidence report.

A silent capture (no bytes at all, or only bytes that form no frame) must lead with a critical
finding, never read as a healthy bus; no hex byte, timestamp or interval may be split across two
lines (measured from the rendered text boxes, on screen and in print at A4 width); the dashboard
of a one-minute capture stays within 2 MB; plotly's "download as PNG" button produces a PNG file
under the page's content-security policy. Screenshots go to test-artifacts/ for a person to look at.

Source: the PNG signature is that of the PNG specification (ISO/IEC 15948, section 5.2: the eight
bytes 89 50 4E 47 0D 0A 1A 0A; from memory); the A4 width (210 mm) is ISO 216 (common practice);
every other check compares with what the test itself made.
"""

from __future__ import annotations

import random

import pytest
from browser import OfflinePage, require_chromium, screenshot
from buswitness.cli.main import main

pytestmark = pytest.mark.browser

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
#: A4 is 210 mm wide; less the report's 12 mm print margins each side, 186 mm = 703 CSS px at 96 px per inch.
A4_CONTENT_PX = 703

#: Every token of the elements a table marks as unbreakable (times, intervals, numbers with units) and every
#: hex byte: the number of line boxes each one's text occupies, from the rendered text (Range.getClientRects).
SPLIT_TOKENS_JS = """
() => {
  const split = [];
  const lines = (node, start, end) => {
    const r = document.createRange();
    r.setStart(node, start); r.setEnd(node, end);
    const tops = new Set([...r.getClientRects()].filter(b => b.width > 0).map(b => Math.round(b.top)));
    return tops.size;
  };
  const walk = (el, each) => {
    const it = document.createTreeWalker(el, NodeFilter.SHOW_TEXT);
    for (let n = it.nextNode(); n; n = it.nextNode()) each(n);
  };
  let tokens = 0;
  document.querySelectorAll("td.hex").forEach(el => walk(el, n => {
    for (const m of n.data.matchAll(/\\S+/g)) {
      tokens++;
      if (lines(n, m.index, m.index + m[0].length) > 1) split.push(m[0]);
    }
  }));
  document.querySelectorAll(".ts, .digest").forEach(el => walk(el, n => {
    if (!n.data.trim()) return;
    tokens++;
    if (lines(n, 0, n.data.length) > 1) split.push(n.data);
  }));
  return {tokens, split};
}
"""


def _hex_capture(path, data: list[tuple[float, bytes]]) -> None:
    lines = ["# buswitness hex capture: a fictional silent bus", "# baud: 19200", "# format: 8E1", "# latency_ms: 1"]
    lines += [f"{t:.6f} " + b.hex(" ").upper() for t, b in data]
    path.write_text("\n".join(lines) + "\n")


@pytest.fixture(scope="module")
def reports(tmp_path_factory):
    require_chromium()
    d = tmp_path_factory.mktemp("reports")
    assert main(["demo", "--dir", str(d / "demo"), "--duration", "30m", "--no-progress"]) == 0
    rng = random.Random(15)
    _hex_capture(d / "nothing.hex", [])
    _hex_capture(d / "garbage.hex", [(0.05 * i, bytes(rng.randrange(256) for _ in range(rng.randint(3, 12))))
                                     for i in range(1200)])
    for name in ("nothing", "garbage"):
        assert main(["analyze", str(d / f"{name}.hex"), "--no-progress", "--html", str(d / f"{name}.html")]) == 0
        assert main(["evidence", str(d / f"{name}.hex"), "--station", "1", "--no-progress",
                     "-o", str(d / f"{name}-evidence.html")]) == 0
    assert main(["simulate", "--duration", "1m", "-o", str(d / "minute.bwcap")]) == 0
    assert main(["analyze", str(d / "minute.bwcap"), "--no-progress", "--html", str(d / "minute.html")]) == 0
    return d


def _demo_evidence(reports):
    (path,) = sorted((reports / "demo").glob("evidence-station*.html"))
    return path


def _no_split_tokens(page) -> int:
    found = page.evaluate(SPLIT_TOKENS_JS)
    assert found["split"] == [], found["split"][:10]
    return found["tokens"]


@pytest.mark.parametrize("name, headline", [("nothing", "No traffic"), ("garbage", "cannot read this line")])
def test_a_silent_capture_leads_both_reports_with_a_critical_finding(reports, name, headline):
    with OfflinePage(reports / f"{name}.html") as (page, visit):
        first = page.locator("#summary .finding").first
        assert first.locator(".sev").inner_text().lower() == "critical"
        assert headline in first.inner_text()
        assert page.locator("#summary .allclear").count() == 0
        # no empty chart: no station chart at all, and only what the line carried (busy time, events) for garbage
        for chart in ("chart-rt", "chart-avail", "chart-dist", "chart-timeline"):
            assert page.locator(f"#{chart}").count() == 0, chart
        drawn = page.locator(".js-plotly-plot").count()
        assert drawn == 0 if name == "nothing" else drawn == 2
        screenshot(page, f"silent-{name}-dashboard.png")
    assert visit.errors == [] and visit.blocked == []
    with OfflinePage(reports / f"{name}-evidence.html", width=1000) as (page, visit):
        first = page.locator(".finding").first
        assert first.locator(".sev").inner_text().lower() == "critical" and headline in first.inner_text()
        assert "cannot serve as evidence" in page.locator("p.silent").inner_text()
        assert "licensed practice" in page.locator(".caution").inner_text()
        screenshot(page, f"silent-{name}-evidence.png")
    assert visit.errors == [] and visit.blocked == []


def test_the_demo_dashboard_splits_no_hex_byte_or_time_across_lines(reports):
    with OfflinePage(reports / "demo" / "report.html", width=1100) as (page, visit):
        page.wait_for_function("() => document.body.dataset.charts === 'drawn'", timeout=30_000)
        assert page.locator("#summary .finding .sev-critical").count() >= 1
        plots = page.evaluate("new Set(document.getElementById('chart-rt').data.map(t => t.xaxis)).size")
        assert plots == page.locator("#station-table tbody tr").count() == 8  # one small plot per station
        assert _no_split_tokens(page) > 100
        screenshot(page, "demo-dashboard.png")
    assert visit.errors == [] and visit.blocked == []


def test_the_demo_evidence_report_splits_no_token_on_screen_or_on_a4(reports):
    with OfflinePage(_demo_evidence(reports), width=900) as (page, visit):
        assert _no_split_tokens(page) > 50
        screenshot(page, "demo-evidence.png")
        page.emulate_media(media="print")
        page.set_viewport_size({"width": A4_CONTENT_PX, "height": 1000})
        assert _no_split_tokens(page) > 50
        # every table fits the A4 content width, and no list is cut off by a scrolling box
        wide = page.evaluate("[...document.querySelectorAll('table')].filter(t => t.scrollWidth > "
                             f"{A4_CONTENT_PX} + 1).map(t => t.className || t.tagName)")
        assert wide == []
        assert page.evaluate("document.documentElement.scrollWidth") <= A4_CONTENT_PX
        screenshot(page, "demo-evidence-print.png")
        pdf = page.pdf(format="A4", print_background=False)
        assert pdf.startswith(b"%PDF")
    assert visit.errors == [] and visit.blocked == []


def test_a_one_minute_dashboard_is_at_most_two_megabytes_and_its_png_button_downloads_a_png(reports):
    assert (reports / "minute.html").stat().st_size <= 2_000_000
    with OfflinePage(reports / "minute.html") as (page, visit):
        page.wait_for_function("() => document.body.dataset.charts === 'drawn'", timeout=30_000)
        assert page.locator(".modebar-btn[data-title*='share' i], .modebar-btn[data-title*='Chart Studio']").count() == 0
        assert page.locator("a[href*='plot.ly'], a[href*='plotly.com']").count() == 0
        chart = page.locator("#chart-util")
        chart.hover()
        with page.expect_download(timeout=30_000) as info:
            chart.locator(".modebar-btn[data-title*='png' i]").click()
        download = info.value
        assert download.suggested_filename == "buswitness-util.png"
        data = open(download.path(), "rb").read()
        assert data.startswith(PNG_SIGNATURE) and len(data) > 1000
        screenshot(page, "minute-dashboard.png")
    assert visit.errors == [] and visit.blocked == []
    assert not [m for m in visit.console if "Content Security Policy" in m]
