"""The bus description joined with simulated traffic whose faults match its flaws: the right rule and
device rank first, and the findings cite both the plan rule and the traffic.

The scenarios (simulate/scenarios/plan-*.json) inject each flaw's traffic symptom; the expected
station and rule come from the sample description's flaws (sample_captures/pumpstation-bus.toml),
not from the analysis. Plan rule sources: MSL V1.02 §3.4.3 (stubs), §3.4.5 (terminators), §3.4.6 (bias).
"""

from __future__ import annotations

from pathlib import Path

import pytest
from buswitness.analysis.busplan import load_plan, parse_plan
from buswitness.analysis.pipeline import AnalysisOptions, analyze
from buswitness.analysis.planjoin import health, joined_findings
from buswitness.analysis.planrules import PLAN_CAUTION, check_plan
from buswitness.capture.sources import open_capture
from buswitness.simulate import load_scenario, simulate
from buswitness.tomlcompat import tomllib

ROOT = Path(__file__).resolve().parents[1]
SAMPLE = ROOT / "sample_captures" / "pumpstation-bus.toml"
DURATION_S = 240.0

#: Each scenario's flaw in the sample description: the sample's text with the other two flaws repaired.
FIXES = {
    "stub": ("stub_m = 60\n", "stub_m = 5\n"),
    "bias": ('name = "Remote I/O panel"\nposition_m = 240\nbias = true\n',
             'name = "Remote I/O panel"\nposition_m = 240\n'),
    "far-end": ('position_m = 420\nterminator = false\n', 'position_m = 420\nterminator = true\n'),
}
CASES = {  # scenario -> (flaw left in, joined rule, station, traffic pattern)
    "plan-far-end-open": ("far-end", "plan-termination", 9, "distance-trend"),
    "plan-long-stub": ("stub", "plan-stub-length", 6, "station-apart"),
    "plan-two-bias": ("bias", "plan-bias", None, "whole-bus"),
}


def plan_with_only(flaw: str):
    text = SAMPLE.read_text()
    for name, (bad, good) in FIXES.items():
        if name != flaw:
            assert bad in text
            text = text.replace(bad, good)
    return parse_plan(tomllib.loads(text), text, f"only-{flaw}.toml")


@pytest.fixture(scope="module")
def captures(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("planjoin")
    out = {}
    for name in CASES:
        path = tmp / f"{name}.bwcap"
        simulate(load_scenario(name), duration_s=DURATION_S, seed=5).write(path)
        out[name] = path
    return out


def analysed(path: Path, plan):
    return analyze(open_capture(path), AnalysisOptions(station_map=plan.station_map(), progress=False))


@pytest.mark.parametrize("scenario", list(CASES))
@pytest.mark.parametrize("which", ["only-this-flaw", "sample-with-all-three"])
def test_matching_flaw_and_device_rank_first(captures, scenario, which):
    flaw, rule, station, pattern = CASES[scenario]
    plan = plan_with_only(flaw) if which == "only-this-flaw" else load_plan(SAMPLE)
    result = analysed(captures[scenario], plan)
    top = result.findings[0]
    assert (top.rule, top.station) == (rule, station), [(f.rule, f.station) for f in result.findings[:4]]
    assert top.evidence["traffic_pattern"] == pattern
    assert top.evidence["plan_status"] == "fail" and "MSL §3.4" in top.evidence["plan_source"]
    assert "The traffic and the description agree" in top.statement and top.caution == PLAN_CAUTION
    # the traffic-only finding it explains is not listed beside it
    assert not {"far-station-errors", "station-errors", "errors-bus-wide"} & {f.rule for f in result.findings}


def test_errors_grow_toward_the_unterminated_far_end(captures):
    result = analysed(captures["plan-far-end-open"], plan_with_only("far-end"))
    top = result.findings[0]
    by_pos = top.evidence["by_position"]
    assert [row["position_m"] for row in by_pos] == sorted(row["position_m"] for row in by_pos)
    assert by_pos[-1]["damaged_share"] > 3 * by_pos[0]["damaged_share"]
    assert top.evidence["toward_end_m"] == 420 and "far end" in top.statement


def test_a_clean_capture_joins_nothing(tmp_path):
    path = tmp_path / "clean.bwcap"
    simulate(load_scenario("clean"), duration_s=60.0, seed=1).write(path)
    result = analyze(open_capture(path), AnalysisOptions(station_map=load_plan(SAMPLE).station_map(),
                                                         progress=False))
    assert not [f for f in result.findings if f.rule.startswith("plan-")]
    assert joined_findings(load_plan(SAMPLE), check_plan(load_plan(SAMPLE)), result) == []


def test_health_is_the_share_of_failed_polls(captures):
    result = analysed(captures["plan-long-stub"], load_plan(SAMPLE))
    s6, s1 = result.station(6), result.station(1)
    assert health(s6) == pytest.approx((s6.timeouts + s6.late + s6.corrupt) / s6.requests)
    assert health(s6) > 0.05 > health(s1)
    assert health(None) is None


def test_plan_check_with_capture_prints_the_joined_finding(captures, capsys, tmp_path):
    from buswitness.cli.main import main
    assert main(["plan", "check", str(SAMPLE), "--capture", str(captures["plan-long-stub"]), "--no-progress",
                 "--json", str(tmp_path / "p.json"), "--html", str(tmp_path / "plan.html")]) == 0
    text = capsys.readouterr().out
    joined = text[text.index("Joined with the capture"):]
    assert "[plan+traffic] plan-stub-length" in joined.splitlines()[1]
    assert "Energy meter (6)" in joined
    import json
    data = json.loads((tmp_path / "p.json").read_text())
    along = data["stations"]
    assert [a["position_m"] for a in along] == sorted(a["position_m"] for a in along)
    worst = max(along, key=lambda a: a["failed_share"])
    assert (worst["address"], worst["stub_m"]) == (6, 60)
    assert data["findings"][0]["rule"] == "plan-stub-length"
    page = (tmp_path / "plan.html").read_text()
    assert page.count('<tr data-address="') == len(along) == 8


def test_analyze_accepts_the_description(captures, capsys, tmp_path):
    from buswitness.cli.main import main
    assert main(["analyze", str(captures["plan-two-bias"]), "--stations", str(SAMPLE), "--no-progress",
                 "--json", str(tmp_path / "s.json")]) == 0
    assert "biased at 2 points" in capsys.readouterr().out


# -- silence after the master's requests, on hand-built figures ---------------------------------------

def _result(plan, silent: set[int], seconds: float = 120.0):
    from buswitness.analysis.pipeline import analyze_tables
    from test_analysis_support import Tx, header, tables
    txs, t = [], 0.1
    while t < seconds:
        for i, st in enumerate(d.address for d in plan.stations):
            txs.append(Tx(t + i * 0.05, st, "timeout" if st in silent else "ok",
                          float("nan") if st in silent else 10.0))
        t += 0.5
    result = analyze_tables(header(), [tables(txs)], AnalysisOptions(timeout_ms=200.0,
                                                                     station_map=plan.station_map()))
    from buswitness.analysis.pipeline import evaluate_findings
    result.findings = evaluate_findings(result)
    return result


REPEATED = """
[bus]
name = "two segments"
baud = 19200
signal_common = true
[master]
position_m = 0
terminator = true
bias = true
[stations.1]
position_m = 200
[stations.2]
position_m = 450
[[repeaters]]
name = "hall repeater"
position_m = 500
terminator_near = true
terminator_far = true
[stations.3]
position_m = 700
[stations.4]
position_m = 900
terminator = true
[shield]
grounded_at_m = [0, 600]
"""


def test_no_station_answers_and_the_master_pair_is_reversed():
    # MSL §3.3.2 naming; common practice: a master whose every request goes unanswered has A/B swapped first
    text = REPEATED.replace("[master]\nposition_m = 0\n", '[master]\nposition_m = 0\nlabel_a = "D1"\n')
    plan = parse_plan(tomllib.loads(text), text, "t.toml")
    result = _result(plan, silent={1, 2, 3, 4})
    top = result.findings[0]
    assert top.rule == "plan-ab-wiring" and top.evidence["traffic_pattern"] == "silence-after-requests"
    assert "no station answers" in top.statement and top.evidence["plan_status"] == "fail"
    assert "no-answers" not in {f.rule for f in result.findings}


def test_no_station_answers_names_the_master_pair_even_when_described_right():
    plan = parse_plan(tomllib.loads(REPEATED), REPEATED, "t.toml")
    joined = joined_findings(plan, None, _result(plan, silent={1, 2, 3, 4}))
    assert [(f.rule, f.evidence["plan_status"]) for f in joined] == [("plan-ab-wiring", "warn")]


def test_every_station_beyond_the_repeater_silent():
    plan = parse_plan(tomllib.loads(REPEATED), REPEATED, "t.toml")
    result = _result(plan, silent={3, 4})
    joined = [f for f in result.findings if f.rule.startswith("plan-")]
    assert [f.rule for f in joined] == ["plan-repeater"] and result.findings[0] is joined[0]
    assert joined[0].evidence["silent_beyond"] == [3, 4] and joined[0].evidence["repeater_m"] == 500
    assert "2 station(s) beyond hall repeater never answer while 2 before it do" in joined[0].statement
    assert not {"never-present", "no-answers"} & {f.rule for f in result.findings}  # the dead segment explains them


def test_one_silent_station_with_its_pair_reversed():
    text = REPEATED.replace("[stations.3]\nposition_m = 700\n", '[stations.3]\nposition_m = 700\nwire_on_a = "D1"\n')
    plan = parse_plan(tomllib.loads(text), text, "t.toml")
    result = _result(plan, silent={3})
    top = result.findings[0]
    assert (top.rule, top.station) == ("plan-ab-wiring", 3)
    assert top.evidence["traffic_pattern"] == "station-apart" and "never answered" in top.statement


def test_two_devices_on_one_address_are_not_read_as_the_wire():
    # the demo night: the far station's damage comes from a second device on its address, not the open end
    capture = ROOT / "sample_captures" / "pumpstation-5min.bwcap"
    result = analyze(open_capture(capture), AnalysisOptions(station_map=load_plan(SAMPLE).station_map(),
                                                            progress=False))
    assert (result.findings[0].rule, result.findings[0].station) == ("duplicate-address", 9)
    assert not [f for f in result.findings if f.rule.startswith("plan-") and f.station == 9]


def test_an_unreadable_line_joins_nothing(tmp_path):
    path = tmp_path / "polarity.bwcap"
    simulate(load_scenario("fault-polarity"), duration_s=30.0, seed=1).write(path)
    result = analyze(open_capture(path), AnalysisOptions(station_map=load_plan(SAMPLE).station_map(),
                                                         progress=False))
    assert result.findings[0].rule == "unreadable-line"
    assert not [f for f in result.findings if f.rule.startswith("plan-")]
