"""The trend page in headless Chromium: offline, no script errors, one chart per station drawn.

Source: the checks compare with what the test itself made; no check value comes from outside the project.
"""

from __future__ import annotations

import pytest
from browser import OfflinePage, require_chromium, screenshot

pytest.importorskip("duckdb")
pytest.importorskip("pyarrow")

from buswitness.analysis.dataset import add_captures
from buswitness.analysis.trend import changes, nightly, write_page
from buswitness.simulate.nights import Fault, fleet_nights

pytestmark = pytest.mark.browser


def test_trend_page_draws_every_chart_offline(tmp_path):
    require_chromium()
    week = fleet_nights(tmp_path / "captures", {"east": Fault(3, 4, 6), "west": None}, 7, 60.0)
    root = tmp_path / "ds"
    for bus, paths in week.items():
        add_captures(root, paths, site="plant", bus=bus)
    table = nightly(root)
    write_page(tmp_path / "trend.html", table, changes(table), root, {})
    with OfflinePage(tmp_path / "trend.html", width=1300, height=1100) as (page, visit):
        page.wait_for_selector(".trend-plot .main-svg")
        drawn = page.eval_on_selector_all(".trend-plot", "els => els.filter(e => e.querySelector('.main-svg')).length")
        assert drawn == 6  # two buses, three stations each
        assert page.locator("table.changes tr.worse").count() >= 1
        assert page.locator("table.changes tr.better").count() >= 1
        screenshot(page, "trend.png", full_page=False)
    assert visit.errors == [] and visit.blocked == [] and visit.dialogs == []
