"""The bus description: read as written, a station map stays a station map, mistakes name the line and the fix.

Check values from outside the project carry their source inline (MSL = MODBUS over Serial Line V1.02).

Source: check values are the test's own fictional plant; rule limits cite MSL V1.02 inline where used.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from buswitness.analysis.busplan import load_plan
from buswitness.analysis.stationmap import load_station_map
from buswitness.errors import EXIT_BAD_INPUT, InputFileError

SAMPLE = Path(__file__).resolve().parents[1] / "sample_captures" / "pumpstation-bus.toml"


def write(tmp_path, text: str) -> Path:
    p = tmp_path / "bus.toml"
    p.write_text(text)
    return p


def test_sample_description_reads_whole():
    plan = load_plan(SAMPLE)
    assert plan.name == "Pump station bus 2" and plan.baud == 19200
    assert plan.master is not None and plan.master.terminator and plan.master.bias
    assert [d.address for d in plan.stations] == [1, 3, 7, 4, 5, 6, 8, 9]
    by = {d.address: d for d in plan.stations}
    assert by[1].unit_load == 0.125  # "1/8" as a fractional unit load
    assert by[6].stub_m == 60 and by[9].terminator is False
    assert plan.shield_grounds_m == [0.0] and plan.signal_common is True
    assert [(s.start_m, s.end_m) for s in plan.segments()] == [(0.0, 420.0)]


def test_description_is_a_station_map_for_analyze():
    smap = load_station_map(SAMPLE)
    assert smap.label(7) == "Pump drive B (7)" and smap.get(9).position_m == 420
    assert smap.plan is not None and smap.plan.name == "Pump station bus 2"


def test_plain_station_map_is_unchanged(tmp_path):
    p = write(tmp_path, '[stations.7]\nname = "Pump drive B"\nposition_m = 310\nnotes = "cabinet 2"\n')
    smap = load_station_map(p)
    assert smap.label(7) == "Pump drive B (7)" and smap.plan is None


def test_repeaters_split_the_trunk_into_segments(tmp_path):
    p = write(tmp_path, """
[bus]
name = "two segments"
[master]
position_m = 0
[stations.1]
position_m = 300
[[repeaters]]
name = "hall repeater"
position_m = 500
[stations.2]
position_m = 900
""")
    plan = load_plan(p)
    segs = plan.segments()
    assert [(s.start_m, s.end_m) for s in segs] == [(0.0, 500.0), (500.0, 900.0)]
    assert plan.segment_of(300).index == 1 and plan.segment_of(900).index == 2
    assert plan.segment_of(500).index == 1  # at the repeater: the master's side


@pytest.mark.parametrize("text, line, words", [
    ('[bus]\nname = "x"\n[stations.7]\nname = "P"\nposition_m = "far"\n', 5, "position_m"),
    ('[bus]\nname = "x"\n[stations.7]\nname = "P"\nposition_m = 3\nunit_load = "a lot"\n', 6, "unit load"),
    ('[bus]\nname = "x"\n[stations.7]\nposition_m = 3\nterminator = "yes"\n', 5, "true or false"),
    ('[bus]\nname = "x"\n\n[stations.300]\nposition_m = 3\n', 4, "1 to 247"),
    ('[bus]\nname = "x"\n[stations.7]\nname = "P"\n', 3, "position_m"),
    ('[bus]\nname = "x"\n[stations.7]\nposition_m = 3\nterminater = true\n', 5, "unknown key"),
    ('[bus]\nname = "x"\n[stations.7]\nposition_m = 3\nwire_on_a = "B+"\n', 5, "D0 or D1"),
    ('[bus]\nname = "x"\nbaud = "fast"\n', 3, "baud"),
    ('[bus]\nname = "x"\n[[repeaters]]\nname = "r"\n', 3, "position_m"),
    ('[bus]\nname = "x"\nlength_m = 100\n[stations.7]\nposition_m = 300\n', 4, "beyond the trunk"),
])
def test_mistakes_name_the_line_and_the_fix(tmp_path, text, line, words):
    p = write(tmp_path, text)
    with pytest.raises(InputFileError, match=f"line {line}:.*{words}") as exc:
        load_plan(p)
    assert exc.value.exit_code == EXIT_BAD_INPUT
    assert exc.value.hint, "every mistake says how to fix it"
    with pytest.raises(InputFileError, match=f"line {line}"):
        load_station_map(p)  # analyze --stations reads the same description


def test_not_toml_and_missing_file(tmp_path):
    with pytest.raises(InputFileError, match="not valid TOML"):
        load_plan(write(tmp_path, "[bus\n"))
    with pytest.raises(InputFileError, match="no such"):
        load_plan(tmp_path / "nothing.toml")
