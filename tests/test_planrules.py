"""The installation check's rules, each on small descriptions built around the published limits.

Sources (keys of ../shared/REFERENCES.md): MSL = MODBUS over Serial Line V1.02; TIA/EIA-485-A as
published in TI SLLA628 and AN-1057; TIA-422-B Annex A.1.1; NSC AN-847. "common practice" marks
a rule of thumb with no single source.
"""

from __future__ import annotations

import pytest
from buswitness.analysis.busplan import parse_plan
from buswitness.analysis.planrules import PLAN_CAUTION, RULES, SOURCES, check_plan
from buswitness.tomlcompat import tomllib


def plan_of(text: str):
    return parse_plan(tomllib.loads(text), text, "test-bus.toml")


def verdicts(text: str, rule: str) -> list:
    return [r for r in check_plan(plan_of(text)) if r.rule == rule]


def statuses(text: str, rule: str) -> set[str]:
    return {r.status for r in verdicts(text, rule)}


#: A healthy two-station bus: master terminated and biased at 0 m, far station terminated at 300 m.
GOOD = """
[bus]
name = "good"
baud = 19200
signal_common = true
[cable]
impedance_ohm = 120
gauge_awg = 24
[master]
position_m = 0
terminator = true
bias = true
bias_ohm = 560
[stations.1]
position_m = 100
[stations.2]
position_m = 300
terminator = true
[shield]
grounded_at_m = [0]
"""


def test_a_healthy_bus_passes_every_rule():
    results = check_plan(plan_of(GOOD))
    assert {r.status for r in results} == {"pass"}, [r.statement for r in results if r.status != "pass"]
    assert {r.rule for r in results} >= set(RULES) - {"repeater"}


def stations(n: int, ul: str = "1", start_m: int = 10) -> str:
    return "".join(f"[stations.{i + 1}]\nposition_m = {start_m + i}\nunit_load = {ul!r}\n".replace("'", '"')
                   for i in range(n))


def with_far_end(text: str, far_m: int) -> str:
    return text + f"[stations.247]\nposition_m = {far_m}\nterminator = true\n"


HEAD = ('[bus]\nname = "t"\nbaud = 9600\nsignal_common = true\n[shield]\ngrounded_at_m = [0]\n'
        '[master]\nposition_m = 0\nterminator = true\n')


def test_33_unit_loads_fail_32_pass():
    # TIA/EIA-485-A: 32 unit loads per segment (1.5 V into 54 ohm = 32 UL + two 120 ohm terminators, TI SLLA628)
    # master (1) + 30 stations + the far station (1) = 32; one more is 33
    assert statuses(with_far_end(HEAD + stations(30), 500), "unit-loads") == {"pass"}
    failed = verdicts(with_far_end(HEAD + stations(31), 500), "unit-loads")
    assert [r.status for r in failed] == ["fail"] and failed[0].numbers["unit_loads"] == 33
    assert failed[0].numbers["limit"] == 32 and failed[0].caution == PLAN_CAUTION


def test_bias_lowers_the_unit_load_limit_by_four():
    # MSL §3.4.6 and TI AN-1057: with the Modbus bias the maximum drops by 4, to 28
    biased = HEAD.replace("terminator = true\n", "terminator = true\nbias = true\n", 1)
    assert statuses(with_far_end(biased + stations(26), 500), "unit-loads") == {"pass"}   # 28
    assert statuses(with_far_end(biased + stations(27), 500), "unit-loads") == {"fail"}   # 29


def test_fractional_unit_loads_add_up():
    # 1/8 unit load transceivers (datasheet ratings; common practice): 240 of them are 30 UL, + master + far = 32
    r = verdicts(with_far_end(HEAD + stations(240, "1/8"), 500), "unit-loads")
    assert [x.status for x in r] == ["pass"] and r[0].numbers["unit_loads"] == 32


def test_1300_m_at_9600_baud_warns():
    # TIA-422-B Annex A.1.1: 1200 m below 90 kbit/s (24 AWG, 52.5 pF/m)
    r = verdicts(with_far_end(HEAD, 1300), "segment-length")
    assert [x.status for x in r] == ["warn"] and r[0].numbers["limit_m"] == 1200
    assert statuses(with_far_end(HEAD, 1200), "segment-length") == {"pass"}


def test_far_over_the_length_fails():
    # 1200 m is the published length at 9600 bps; 2000 m is beyond our 1.5x margin
    assert statuses(with_far_end(HEAD, 2000), "segment-length") == {"fail"}


def test_awg26_cable_is_held_to_1000_m():
    # MSL §3.4.3: 1000 m at up to 9600 bps with AWG26
    text = with_far_end(HEAD + "[cable]\ngauge_awg = 26\n", 1100)
    r = verdicts(text, "segment-length")
    assert [x.status for x in r] == ["warn"] and r[0].numbers["limit_m"] == 1000


def test_length_shrinks_above_100_kbps():
    # Renesas RS-485 tutorial: 4000 ft up to 100 kbps, about 10x shorter per 10x faster -> 1000 kbps ~ 120 m
    text = with_far_end(HEAD.replace("baud = 9600", "baud = 1000000"), 200)
    r = verdicts(text, "segment-length")
    assert r[0].numbers["limit_m"] == pytest.approx(120.0) and r[0].status == "fail"


def test_terminator_in_mid_trunk_fails():
    # MSL §3.4.5: one terminator at each end of the trunk, none elsewhere
    text = with_far_end(HEAD + "[stations.5]\nposition_m = 150\nterminator = true\n", 300)
    bad = [r for r in verdicts(text, "termination") if r.status == "fail"]
    assert len(bad) == 1 and bad[0].devices == ["station 5"] and "mid-trunk" in bad[0].statement


def test_missing_far_end_terminator_fails_on_the_far_device():
    # MSL §3.4.5: a terminator at each end of the trunk
    text = HEAD + "[stations.9]\nposition_m = 420\n"
    bad = [r for r in verdicts(text, "termination") if r.status == "fail"]
    assert len(bad) == 1 and bad[0].devices == ["station 9"] and bad[0].position_m == 420


def test_terminator_on_a_stub_fails():
    # MSL §3.4.5: none on stubs
    text = with_far_end(HEAD + "[stations.5]\nposition_m = 300\nstub_m = 10\nterminator = true\n", 300)
    bad = [r for r in verdicts(text, "termination") if r.status == "fail"]
    assert [r.devices for r in bad] == [["station 5"]] and "stub" in bad[0].statement


def test_two_terminators_at_one_end_fail():
    text = with_far_end(HEAD, 300) + "[[terminators]]\nposition_m = 300\nohm = 120\n"
    bad = [r for r in verdicts(text, "termination") if r.status == "fail"]
    assert len(bad) == 1 and bad[0].numbers["terminators_here"] == 2


def test_each_repeater_side_is_a_segment_end():
    text = (with_far_end(HEAD, 900) + "[[repeaters]]\nposition_m = 500\nterminator_near = true\n"
            "[stations.3]\nposition_m = 300\n")
    bad = [r for r in verdicts(text, "termination") if r.status == "fail"]
    # segment 2 (500-900 m) has its far end terminated, but not its start at the repeater's far side
    assert len(bad) == 1 and bad[0].segment == 2 and bad[0].devices == ["repeater 1"]


@pytest.mark.parametrize("ohm, status", [
    (120, "pass"), (150, "pass"),   # MSL §3.4.5: 150 ohm is the guide's own value on ~120 ohm cable
    (100, "pass"), (220, "warn"), (60, "warn"), (470, "fail"), (1000, "fail")])  # mismatch: common practice
def test_terminator_value_against_the_cable(ohm, status):
    text = GOOD.replace("[stations.2]\nposition_m = 300\nterminator = true\n",
                        f"[stations.2]\nposition_m = 300\nterminator = true\nterminator_ohm = {ohm}\n")
    r = [x for x in verdicts(text, "terminator-value") if "station 2" in x.devices]
    assert r[0].status == status


def test_cable_under_100_ohm_warns():
    # MSL §3.4.5/§3.6: a cable impedance over 100 ohm preferred
    text = GOOD.replace("impedance_ohm = 120", "impedance_ohm = 75")
    assert any(r.subject == "cable" and r.status == "warn" for r in verdicts(text, "terminator-value"))


def test_two_bias_networks_fail_none_warns_and_the_value_is_checked():
    # MSL §3.4.6: bias at one point only, 450-650 ohm
    two = GOOD.replace("[stations.1]\nposition_m = 100\n", "[stations.1]\nposition_m = 100\nbias = true\n")
    r = verdicts(two, "bias")
    assert [x.status for x in r] == ["fail"] and set(r[0].devices) == {"master", "station 1"}
    assert statuses(GOOD.replace("bias = true\n", ""), "bias") == {"warn"}
    assert statuses(GOOD.replace("bias_ohm = 560", "bias_ohm = 1000"), "bias") == {"warn"}
    assert statuses(GOOD.replace("bias_ohm = 560", "bias_ohm = 450"), "bias") == {"pass"}


def test_stub_over_20_m_fails():
    # MSL §3.4.3: stubs up to 20 m
    assert statuses(GOOD.replace("position_m = 100\n", "position_m = 100\nstub_m = 20\n"), "stub-length") == {"pass"}
    r = verdicts(GOOD.replace("position_m = 100\n", "position_m = 100\nstub_m = 60\n"), "stub-length")
    assert [x.status for x in r] == ["fail"] and r[0].devices == ["station 1"] and r[0].numbers["stub_m"] == 60


def test_star_and_ring_fail_master_mid_trunk_warns():
    # MSL §3.4 (from memory): one trunk, devices daisy-chained or on short derivations
    star = GOOD + "[stations.5]\nposition_m = 150\nstub_m = 80\n[stations.6]\nposition_m = 150\nstub_m = 90\n"
    r = [x for x in verdicts(star, "topology") if x.status == "fail"]
    assert len(r) == 1 and set(r[0].devices) == {"station 5", "station 6"}
    assert statuses(GOOD.replace('name = "good"', 'name = "good"\nring = true'), "topology") == {"fail"}
    mid = GOOD.replace("[master]\nposition_m = 0\nterminator = true\n", "[master]\nposition_m = 200\n")
    assert "warn" in statuses(mid, "topology")


def test_shield_grounded_at_two_points_or_none_warns():
    # common practice: ground the shield at one point per segment
    assert statuses(GOOD.replace("grounded_at_m = [0]", "grounded_at_m = [0, 300]"), "shield") == {"warn"}
    assert statuses(GOOD.replace("grounded_at_m = [0]", "grounded_at_m = []"), "shield") == {"warn"}


def test_missing_signal_common_fails():
    # MSL §3.3.2 (from memory): the common links every device; TIA/EIA-485-A common mode -7..+12 V (TI SLLA628)
    assert statuses(GOOD.replace("signal_common = true", "signal_common = false"), "signal-common") == {"fail"}
    assert statuses(GOOD.replace("signal_common = true\n", ""), "signal-common") == {"warn"}


def test_repeater_on_a_stub_fails_and_one_with_nothing_beyond_warns():
    rep = GOOD + "[[repeaters]]\nposition_m = 300\nstub_m = 5\n"
    assert "fail" in statuses(rep, "repeater")
    empty = GOOD + "[[repeaters]]\nposition_m = 350\nterminator_near = true\n[bus2]\n"
    with pytest.raises(Exception, match="unknown table"):
        plan_of(empty)
    empty = GOOD.replace('[bus]\nname = "good"', '[bus]\nname = "good"\nlength_m = 400') + \
        "[[repeaters]]\nposition_m = 350\n"
    assert "warn" in statuses(empty, "repeater")


def test_reversed_pair_at_a_device_fails():
    # MSL §3.3.2: D0 = A, D1 = B; a maker labelling its A as D1 needs D1 on it (common practice: labels differ)
    assert statuses(GOOD.replace("position_m = 100\n", 'position_m = 100\nlabel_a = "D1"\nwire_on_a = "D1"\n'),
                    "ab-wiring") == {"pass"}
    r = verdicts(GOOD.replace("position_m = 100\n", 'position_m = 100\nlabel_a = "D1"\n'), "ab-wiring")
    assert [x.status for x in r] == ["fail"] and r[0].devices == ["station 1"]


def test_sample_plant_fails_exactly_its_three_flaws():
    from pathlib import Path

    from buswitness.analysis.busplan import load_plan
    plan = load_plan(Path(__file__).resolve().parents[1] / "sample_captures" / "pumpstation-bus.toml")
    failed = {(r.rule, tuple(r.devices)) for r in check_plan(plan) if r.status == "fail"}
    assert failed == {("termination", ("station 9",)), ("stub-length", ("station 6",)),
                      ("bias", ("master", "station 8"))}


def test_every_rule_names_its_source_and_every_fix_carries_the_caution():
    for rule in RULES:
        assert SOURCES[rule]
    for r in check_plan(plan_of(HEAD + "[stations.9]\nposition_m = 3000\nstub_m = 40\nbias = true\n")):
        assert r.source
        if r.status != "pass" and r.fix:
            assert r.caution == PLAN_CAUTION


def test_common_missing_at_one_device_fails_and_earthed_twice_warns():
    # MSL §3.3.2 (from memory): the common links every device and is bonded to earth at one point
    r = verdicts(GOOD.replace("position_m = 100\n", "position_m = 100\ncommon = false\n"), "signal-common")
    assert [(x.status, x.devices) for x in r] == [("fail", ["station 1"])]
    twice = GOOD.replace("signal_common = true", "signal_common = true\ncommon_earthed_at_m = [0, 300]")
    assert statuses(twice, "signal-common") == {"warn"}
    once = GOOD.replace("signal_common = true", "signal_common = true\ncommon_earthed_at_m = [0]")
    assert statuses(once, "signal-common") == {"pass"}


def test_the_listening_adapter_is_one_more_load_and_its_terminator_is_judged():
    # TIA/EIA-485-A via TI SLLA628: 32 unit loads; the adapter's transceiver counts while connected
    text = with_far_end(HEAD + stations(30), 500)
    assert statuses(text, "unit-loads") == {"pass"}
    with_sniffer = text + "[sniffer]\nposition_m = 250\n"
    r = verdicts(with_sniffer, "unit-loads")
    assert [x.status for x in r] == ["fail"] and r[0].numbers["unit_loads"] == 33
    # MSL §3.4.5: the adapter's own terminator switched on in mid-trunk fails like any other
    bad = [x for x in verdicts(with_sniffer.replace("position_m = 250\n", "position_m = 250\nterminator = true\n"),
                               "termination") if x.status == "fail"]
    assert [x.devices for x in bad] == [["sniffer"]]
