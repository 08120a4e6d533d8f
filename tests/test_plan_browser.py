"""plan.html and the dashboard's plan panel in headless Chromium: offline, no errors, every device and
every failed rule found in the drawing, a screenshot kept in test-artifacts/ for a person to look at.

Source: the expected devices and failures come from the sample description (sample_captures/
pumpstation-bus.toml) and the rules' verdicts, pinned against MSL V1.02 in tests/test_planrules.py.
"""

from __future__ import annotations

import pytest
from browser import ARTIFACTS, OfflinePage, require_chromium, screenshot
from buswitness.analysis.busplan import load_plan
from buswitness.analysis.planrules import check_plan
from buswitness.cli.main import main
from buswitness.simulate import load_scenario, simulate
from test_planjoin import SAMPLE

pytestmark = pytest.mark.browser


@pytest.fixture(scope="module")
def pages(tmp_path_factory):
    require_chromium()
    folder = tmp_path_factory.mktemp("planpages")
    capture = folder / "far-end.bwcap"
    simulate(load_scenario("plan-far-end-open"), duration_s=120.0, seed=5).write(capture)
    assert main(["plan", "check", str(SAMPLE), "--capture", str(capture), "--html", str(folder / "plan.html"),
                 "--no-progress"]) == 0
    assert main(["analyze", str(capture), "--stations", str(SAMPLE), "--html", str(folder / "report.html"),
                 "--json", str(folder / "summary.json"), "--no-progress"]) == 0
    return folder


def expected():
    plan = load_plan(SAMPLE)
    results = check_plan(plan)
    return plan, [r for r in results if r.status == "fail"]


def _check_drawing(page, root: str) -> None:
    plan, failed = expected()
    drawing = page.locator(f"{root} svg.bus-plan")
    assert drawing.count() == 1
    box = drawing.bounding_box()
    assert box and box["width"] > 600 and box["height"] > 200
    for d in plan.devices:
        g = page.locator(f'{root} svg.bus-plan g.device[data-device="{d.key}"]')
        assert g.count() == 1, d.key
        assert g.is_visible()
        assert (d.name or d.key) in g.text_content()
        gb = g.bounding_box()
        assert gb and box["x"] - 1 <= gb["x"] and gb["x"] + gb["width"] <= box["x"] + box["width"] + 1, d.key
    marks = page.locator(f"{root} svg.bus-plan g.mark-fail")
    assert sorted(marks.nth(i).get_attribute("data-rule") for i in range(marks.count())) == \
        sorted(r.rule for r in failed)
    for r in failed:
        mark = page.locator(f'{root} svg.bus-plan g.mark-fail[data-rule="{r.rule}"]')
        assert mark.is_visible()
        assert mark.get_attribute("data-devices").split(",") == r.devices
        listed = page.locator(f'{root} ol.plan-marks li[data-rule="{r.rule}"]')
        assert listed.count() == 1 and r.statement in listed.text_content()
    # stations are shaded from the capture: the far station worse than the nearest
    far = page.locator(f'{root} g.device[data-device="station 9"]').get_attribute("data-failed-share")
    near = page.locator(f'{root} g.device[data-device="station 1"]').get_attribute("data-failed-share")
    assert float(far) > float(near)


def test_plan_page_shows_every_device_and_every_failed_rule(pages):
    with OfflinePage(pages / "plan.html") as (page, visit):
        _check_drawing(page, "#plan")
        assert page.locator('#joined .finding[data-rule="plan-termination"]').count() == 1
        shot = screenshot(page, "plan-page.png")
        page.emulate_media(media="print")
        pdf_box = page.locator("svg.bus-plan").bounding_box()
        assert pdf_box and pdf_box["width"] > 300  # still drawn when printed
    assert shot.exists() and shot.stat().st_size > 10_000
    assert visit.errors == [] and visit.blocked == [] and visit.dialogs == []


def test_dashboard_plan_panel_shows_every_device_and_every_failed_rule(pages):
    with OfflinePage(pages / "report.html") as (page, visit):
        page.wait_for_function("() => document.body.dataset.charts === 'drawn'", timeout=30_000)
        _check_drawing(page, "section#plan")
        ARTIFACTS.mkdir(exist_ok=True)
        shot = ARTIFACTS / "dashboard-plan-panel.png"
        page.locator("section#plan").screenshot(path=str(shot))
    assert shot.stat().st_size > 10_000
    assert visit.errors == [] and visit.blocked == [] and visit.dialogs == []
