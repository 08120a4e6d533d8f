"""The drawing of the bus: every device and every rule not passed is in it, hostile names stay text,
the page is self-contained. Source: the checks compare with the description the test wrote and the
rules' verdicts (tests/test_planrules.py pins those against MSL V1.02 and TIA/EIA-485-A)."""

from __future__ import annotations

import re
import xml.etree.ElementTree as ET
from pathlib import Path

from buswitness.analysis.busplan import load_plan, parse_plan
from buswitness.analysis.plandraw import draw_plan, health_colour
from buswitness.analysis.planreport import render_plan_page
from buswitness.analysis.planrules import check_plan
from buswitness.tomlcompat import tomllib

SAMPLE = Path(__file__).resolve().parents[1] / "sample_captures" / "pumpstation-bus.toml"
SVG = "{http://www.w3.org/2000/svg}"

TWO_SEGMENTS = """
[bus]
name = "Filter hall </svg><script>alert(1)</script>"
baud = 38400
signal_common = false
ring = true
[master]
position_m = 0
terminator = true
[stations.2]
name = "Backwash <b>pump</b>"
position_m = 300
label_a = "D1"
[[repeaters]]
name = "hall repeater"
position_m = 500
terminator_near = true
terminator_far = true
bias_far = true
[stations.3]
position_m = 700
terminator = true
[stations.4]
position_m = 1400
terminator = true
stub_m = 30
[sniffer]
name = "Laptop adapter"
position_m = 690
[shield]
grounded_at_m = [0, 700]
"""


def plan_of(text: str):
    return parse_plan(tomllib.loads(text), text, "t.toml")


def groups(svg: str, cls: str) -> list:
    root = ET.fromstring(svg)
    return [g for g in root.iter(f"{SVG}g") if g.get("class", "").split()[0:1] == [cls]]


def test_every_device_and_every_rule_not_passed_is_drawn():
    for plan in (load_plan(SAMPLE), plan_of(TWO_SEGMENTS)):
        results = check_plan(plan)
        svg = draw_plan(plan, results)
        drawn = {g.get("data-device") for g in groups(svg, "device")}
        assert drawn == {d.key for d in plan.devices}
        assert {g.get("data-device") for g in groups(svg, "repeater")} == {r.key for r in plan.repeaters}
        marks = [(g.get("data-rule"), g.get("data-status")) for g in groups(svg, "mark")]
        assert marks == [(r.rule, r.status) for r in results if r.status != "pass"]


def test_two_segments_drawn_split_at_the_repeater():
    plan = plan_of(TWO_SEGMENTS)
    svg = draw_plan(plan, check_plan(plan))
    assert [g.get("data-segment") for g in groups(svg, "segment")] == ["1", "2"]
    assert len(groups(svg, "shield-ground")) == 2
    # every fitted terminator is drawn where it is: master, both repeater sides, station 3 (mid-trunk),
    # station 4 (at the end of its stub)
    assert len(groups(svg, "terminator")) == 5
    assert "D0/D1 reversed" in svg
    assert [g.get("data-device") for g in groups(svg, "device")] == ["master", "station 2", "sniffer", "station 3",
                                                                     "station 4"]  # in position order


def test_hostile_names_stay_text():
    plan = plan_of(TWO_SEGMENTS)
    page = render_plan_page(plan, check_plan(plan), [], None)
    assert "<script>alert" not in page and "<b>pump</b>" not in page
    assert "&lt;b&gt;pump&lt;/b&gt;" in page
    assert not re.search(r"<(script|link|img|iframe)\b", page)  # no script at all, nothing fetched
    assert "Content-Security-Policy" in page


def test_health_shades_step_with_the_failed_share():
    shades = [health_colour(v) for v in (None, 0.0, 0.005, 0.02, 0.2)]
    assert len(set(shades)) == 5 and shades[0] == "#ffffff"
