"""Scenario files: the built-ins load, and mistakes give one clear message naming file and field.

Source: the checks here compare with what the test itself made (simulator truth, bytes it
wrote, the project's documented formats); no check value comes from outside the project.
"""

import json

import pytest
from buswitness.errors import InputFileError, UsageError
from buswitness.simulate import builtin_names, load_scenario, simulate
from buswitness.simulate.scenario import parse_scenario

GOOD = {
    "name": "mine",
    "bus": {"baud": 9600, "format": "8N2"},
    "master": {"polls": [{"station": 2, "function": 3, "quantity": 3}]},
    "stations": [{"address": 2, "name": "Sump pump"}],
}


def text(**changes):
    data = json.loads(json.dumps(GOOD))
    for path, value in changes.items():
        node = data
        *head, last = path.split("__")
        for key in head:
            node = node[int(key)] if isinstance(node, list) else node[key]
        node[last] = value
    return json.dumps(data)


def test_every_builtin_scenario_loads_and_runs_a_few_seconds():
    names = builtin_names()
    for needed in ("pumpstation", "clean", "saturated115200", "noisy", "fault-late", "fault-silent",
                   "fault-absent", "fault-duplicate", "fault-noise-far", "fault-burst", "fault-fast-turnaround",
                   "fault-gap", "fault-polarity", "fault-wrong-baud", "fault-exceptions", "fault-no-answers",
                   "fault-dead-echo", "fault-late-retry", "fault-damaged-retry", "fault-unbiased",
                   "fault-two-stop-bits", "fault-latency-unstated"):
        assert needed in names
    for name in names:
        sc = load_scenario(name)
        assert sc.description
        res = simulate(sc, duration_s=2, seed=1)
        assert len(res.truth.transactions) > 0


def test_a_users_json_and_toml_file_load(tmp_path):
    (tmp_path / "bus.json").write_text(json.dumps(GOOD))
    assert load_scenario(tmp_path / "bus.json").serial.short_form == "8N2"
    (tmp_path / "bus.toml").write_text(
        'name = "mine"\n[bus]\nbaud = 9600\nformat = "8N1"\n[master]\n'
        '[[master.polls]]\nstation = 2\nfunction = 4\n[[stations]]\naddress = 2\nname = "Sump pump"\n')
    sc = load_scenario(str(tmp_path / "bus.toml"))
    assert sc.master.polls[0].function == 4


@pytest.mark.parametrize("changes, message", [
    ({"stations__0__address": 300}, r"stations\[0\]\.address.*outside 1 to 247"),
    ({"stations__0__colour": "red"}, r"stations\[0\]\.colour.*not a known setting"),
    ({"master__polls__0__function": 9}, r"master\.polls\[0\]\.function.*not one the simulated master sends"),
    ({"master__polls__0__quantity": 200}, r"master\.polls\[0\]\.quantity.*outside 1 to 125"),
    ({"bus__format": "9Q1"}, r"field 'bus'.*character format"),
    ({"master__timeout_ms": "soon"}, r"master\.timeout_ms.*must be a number"),
    ({"events": [{"kind": "silent", "station": 5, "start_s": 1, "duration_s": 2}]},
     r"events\[0\]\.station.*address of a station"),
    ({"events": [{"kind": "earthquake"}]}, r"events\[0\]\.kind.*not one of"),
])
def test_mistakes_name_the_file_and_the_field(changes, message):
    with pytest.raises(InputFileError, match="my-bus.json") as info:
        parse_scenario(text(**changes), "my-bus.json")
    assert info.match(message)


def test_broken_json_and_unknown_names_are_clear(tmp_path):
    bad = tmp_path / "bad.json"
    bad.write_text("{ not json")
    with pytest.raises(InputFileError, match=r"bad\.json.*not valid JSON"):
        load_scenario(bad)
    with pytest.raises(UsageError, match="neither a built-in scenario"):
        load_scenario("no-such-scenario")


def test_overrides_and_bad_arguments():
    sc = load_scenario("clean")
    res = simulate(sc, duration_s=1, baud=9600, bus_format="8N2", latency_ms=1)
    assert str(res.scenario.serial) == "9600 8N2"
    assert res.header.ports[0].latency_ms == 1
    with pytest.raises(UsageError, match="more than zero"):
        simulate(sc, duration_s=0)
    with pytest.raises(UsageError, match="latency"):
        simulate(sc, duration_s=1, latency_ms=999)
