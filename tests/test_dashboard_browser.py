"""The dashboard and the evidence report in headless Chromium: offline, no errors, hostile text inert.

Outside check values carry their source inline (source: the MAP/MSL specifications,
TIMING.md or termios(3), as cited beside each).
"""

from __future__ import annotations

import json

import pytest
from browser import OfflinePage, require_chromium, screenshot
from buswitness.cli.main import main
from buswitness.decode.crc import append_crc

pytestmark = pytest.mark.browser

SCRIPT = b"<script>alert('id')</script>"
IMG = b"<img src=x onerror=alert('img')>"
CLOSE = b"</script><script>alert('close')</script>"


def hostile_hex_capture(path) -> None:
    """Timestamped hex text: three stations polled for two minutes; station 9 identifies itself hostilely."""
    lines = ["# buswitness hex capture: fictional test bus with a hostile device identification", "# baud: 19200",
             "# format: 8E1", "# latency_ms: 1"]
    t = 0.0

    def frame(at: float, data: bytes) -> None:
        lines.append(f"{at:.6f} " + data.hex(" ").upper())

    # FC 11 report server ID (MAP V1.1b3 p31); FC 2B/0E read device identification (MAP p43-45)
    fc11 = append_crc(bytes([9, 0x11]))
    fc11_resp = append_crc(bytes([9, 0x11, len(SCRIPT + IMG) + 1]) + SCRIPT + IMG + b"\xff")
    objects = bytes([0, len(CLOSE)]) + CLOSE + bytes([1, len(IMG)]) + IMG
    mei = append_crc(bytes([9, 0x2B, 0x0E, 0x01, 0x00]))
    mei_resp = append_crc(bytes([9, 0x2B, 0x0E, 0x01, 0x01, 0x00, 0x00, 2]) + objects)
    cycle = 0
    while t < 120.0:
        for station in (1, 2, 9):
            req = append_crc(bytes([station, 3, 0, 0, 0, 2]))
            frame(t + 0.005, req)
            frame(t + 0.005 + 0.012 * station, append_crc(bytes([station, 3, 4, 0, 1, 0, 2])))
            t += 0.2
        if cycle % 20 == 0:
            frame(t + 0.003, fc11)
            frame(t + 0.040, fc11_resp)
            t += 0.2
            frame(t + 0.003, mei)
            frame(t + 0.060, mei_resp)
            t += 0.2
        cycle += 1
    path.write_text("\n".join(lines) + "\n")


@pytest.fixture(scope="module")
def reports(tmp_path_factory):
    require_chromium()
    folder = tmp_path_factory.mktemp("hostile")
    capture = folder / "hostile.hex"
    hostile_hex_capture(capture)
    smap = folder / "stations.toml"
    smap.write_text('[stations.2]\nname = "Tank </script><script>alert(\'name\')</script>"\n')
    assert main(["analyze", str(capture), "--stations", str(smap), "--html", str(folder / "report.html"),
                 "--json", str(folder / "summary.json"), "--no-progress"]) == 0
    assert main(["evidence", str(capture), "--station", "9", "--stations", str(smap), "-o",
                 str(folder / "station9.html"), "--no-progress"]) == 0
    return folder


def test_dashboard_renders_offline_without_errors_and_hostile_text_stays_text(reports):
    summary = json.loads((reports / "summary.json").read_text())
    with OfflinePage(reports / "report.html") as (page, visit):
        page.wait_for_function("() => document.body.dataset.charts === 'drawn'", timeout=30_000)
        rows = page.locator("#station-table tbody tr")
        assert rows.count() == len(summary["stations"]) == 3
        # no timeout, late or damaged answer in this capture: the trouble chart is not drawn at all
        assert page.locator("#chart-timeline").count() == 0
        for chart in ("chart-rt", "chart-avail", "chart-dist", "chart-util"):
            traces = page.evaluate(f"document.getElementById('{chart}').data.length")
            points = page.evaluate(f"document.getElementById('{chart}').data"
                                   f".reduce((n, t) => n + ((t.y || t.z || []).length), 0)")
            assert traces > 0 and points > 0, chart
        identity = page.locator("#station-table tr[data-address='9'] td.ident").inner_text()
        assert SCRIPT.decode() in identity and IMG.decode() in identity and CLOSE.decode() in identity
        assert "</script>" in page.locator("#station-table tr[data-address='2'] td").first.inner_text()
        page.locator("#station-table th", has_text="timeouts").click()
        page.locator("#station-table th", has_text="p95").first.click()
        assert page.locator("#station-table tbody tr").first.get_attribute("data-address") == "9"
        shot = screenshot(page, "dashboard.png")
    assert shot.exists()
    assert visit.errors == [] and visit.dialogs == [] and visit.blocked == []


def test_evidence_report_renders_offline_and_hostile_text_stays_text(reports):
    with OfflinePage(reports / "station9.html", width=1000, height=1600) as (page, visit):
        body = page.locator("body").inner_text()
        assert "Response behaviour of station 9" in body and SCRIPT.decode() in body
        assert page.locator("svg rect.bar").count() > 0
        assert page.evaluate("document.scripts.length") == 0
        screenshot(page, "evidence.png", full_page=False)
        page.emulate_media(media="print")
        screenshot(page, "evidence-print.png", full_page=False)
    assert visit.errors == [] and visit.dialogs == [] and visit.blocked == []
